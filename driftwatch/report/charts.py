"""What every plot shows, as plain data (a :class:`Chart`), built from run records only.

A chart is drawn twice from the same description: as inline SVG for the HTML report
(:func:`driftwatch.report.svg.render`, a few milliseconds, no matplotlib) and as a matplotlib
``Figure`` for notebooks (:func:`driftwatch.report.figure.to_figure`, behind :mod:`driftwatch.plots`).
Styles come from the fixed tables of :mod:`driftwatch.report.style`.

Series that coincide (at every step within half a pixel of a 300-pixel axis) are all drawn, in
their own colour, marker and dash pattern, later ones hollow and dashed over earlier ones, and the
legend names the coincidence (``mirror (= oc at every step)``), so no series hides under another.
Lengths Å; values at or below :data:`FLOOR` are drawn on the bottom axis of log plots.
"""

from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np

from ..records import group_name
from . import style

__all__ = ["FLOOR", "Axis", "Mark", "Panel", "Chart", "run_charts", "layer_map", "deformation",
           "distance", "chirality", "cell", "energy", "spectrum", "displacement", "campaign_scatter",
           "breakpoint_histogram", "flag_bars", "coincident"]

FLOOR = 1e-6
"""Å. Log plots draw values at or below this on the bottom axis (a lattice *at* a type has 0)."""

LOG_TOL = 0.005
"""Decades: two series closer than this at every step coincide on a log axis (~1 %, under a pixel)."""
LIN_TOL = 0.002
"""Fraction of the axis span: two series closer than this at every step coincide on a linear axis."""


# -------------------------------------------------------------------------------------------- model

@dataclass
class Axis:
    """One axis. ``scale``: linear, log or category (ticks at 0..n-1 named by ``ticklabels``)."""
    label: str = ""
    scale: str = "linear"
    lim: tuple | None = None          # data limits; None: from the data
    ticks: list | None = None         # explicit tick positions
    ticklabels: list | None = None    # explicit tick labels (with ``ticks``)
    integer: bool = False             # integer ticks only (ionic steps)
    min_span: float = 0.0             # linear: smallest span shown (flat series stay flat)
    symmetric: bool = False           # linear: limits symmetric about zero
    grid: bool = True


@dataclass
class Mark:
    """Something drawn. ``kind``: line, points, rects, poly, hline, vline, text or key (legend only).

    line/points: ``x``, ``y`` (None = gap); rects: ``x``, ``x1``, ``y``, ``y1``, ``colours``,
    ``texts``; poly: closed polygon ``x``, ``y`` filled with ``fill``; hline/vline: at ``y[0]`` /
    ``x[0]`` with ``note`` written outside the plot; text: ``texts[0]`` at ``x[0]``, ``y[0]``.
    """
    kind: str
    x: list = field(default_factory=list)
    y: list = field(default_factory=list)
    x1: list | None = None
    y1: list | None = None
    colour: str = "#222222"
    marker: str | None = None
    dash: tuple | None = None
    width: float = 1.4
    size: float = 5.0
    hollow: bool = False
    fill: str | None = None
    edge: str | None = None
    label: str | None = None          # legend entry (None: not in the legend)
    key: str | None = None            # what the series is (type symbol, group number), for tests
    z: int = 2
    every: tuple | None = None        # markers on frames start, start + stride, ...
    colours: list | None = None       # per point / per rectangle
    links: list | None = None         # per point: href of the page it names
    tips: list | None = None          # per point / per rectangle: tooltip text
    texts: list | None = None         # per point / per rectangle: label drawn beside or inside
    note: str | None = None           # hline/vline: label outside the plot area
    rotation: float = 0.0             # text: degrees counter-clockwise
    anchor: str = "start"             # text: start, middle, end
    valign: str = "baseline"          # text: baseline, center, top, bottom
    fontsize: float = 10.0
    offset: tuple = (0.0, 0.0)        # text / point labels: (dx, dy) px, dy up
    coords: str = "data"              # text: data, or axes (fractions 0..1)
    patch: bool = False               # key: legend swatch is a filled square
    outside: bool = False             # rects: text after the bar, not inside it


@dataclass
class Panel:
    x: Axis
    y: Axis
    marks: list
    title: str = ""
    legend: str | None = "right"      # right, below or None
    equal: bool = False               # equal scales (maps)
    weight: float = 1.0               # relative width in the row
    colorbar: dict | None = None      # {"label", "lo", "hi"} (viridis)
    frame: bool = True


@dataclass
class Chart:
    name: str
    panels: list
    width: int = 760                  # px (figure inches x 100 for matplotlib)
    height: int = 330
    title: str = ""


# ------------------------------------------------------------------------------------------ helpers

def finite(v) -> float | None:
    """``v`` as a finite float, or None (missing, text, NaN, inf)."""
    try:
        v = float(v)
    except (TypeError, ValueError):
        return None
    return v if math.isfinite(v) else None


def _floor(values):
    out = []
    for v in values:
        v = finite(v)
        out.append(None if v is None else max(v, FLOOR))
    return out


def _steps(frames):
    return [int(f.get("step", f.get("index", i))) for i, f in enumerate(frames)]


END_POINTS_AXIS = "structure (0 initial, 1 final)"


def step_axis(steps, label="ionic step", rec=None) -> Axis:
    """Integer step axis; one frame: that step alone, a step either side. An end-points run's
    (``rec``) two structures are labelled as such, not as ionic steps."""
    if rec is not None and (rec.get("run") or {}).get("kind") == "end-points":
        label = END_POINTS_AXIS
    lo, hi = min(steps), max(steps)
    if lo == hi:
        return Axis(label, lim=(lo - 1, hi + 1), ticks=[lo], integer=True)
    pad = max(0.5, 0.02 * (hi - lo))
    return Axis(label, lim=(lo - pad, hi + pad), integer=True)


def common_symprecs(rec) -> tuple:
    """The record's ``report.common_symprecs`` (Å): its positive finite numbers, in order."""
    vals = ((rec.get("config") or {}).get("report") or {}).get("common_symprecs") or ()
    return tuple(v for v in (finite(x) for x in vals) if v and v > 0)


def config_number(rec, *keys) -> float | None:
    """The number at ``config[keys...]`` of a record, or None where it is missing or not finite."""
    d = rec.get("config") or {}
    for k in keys:
        if not isinstance(d, dict) or k not in d:
            return None
        d = d[k]
    return finite(d)


def coincident(a, b, scale="log", span=None) -> str | None:
    """'=' if two series are equal at every point, '≈' if within the plot's resolution (LOG_TOL
    decades on log axes, LIN_TOL of ``span`` on linear ones), else None. Gaps must match."""
    if len(a) != len(b) or not len(a):
        return None
    exact = True
    for u, v in zip(a, b):
        if (u is None) != (v is None):
            return None
        if u is None:
            continue
        if u != v:
            exact = False
        if not _close(u, v, scale, span):
            return None
    if all(u is None for u in a):
        return None
    return "=" if exact else "≈"


def _close(u: float, v: float, scale="log", span=None) -> bool:
    """Two values within the plot's resolution of each other (LOG_TOL decades on log axes,
    LIN_TOL of ``span`` on linear ones)."""
    if scale == "log":
        return abs(math.log10(u) - math.log10(v)) <= LOG_TOL
    return abs(u - v) <= LIN_TOL * (span or max(abs(u), abs(v), 1e-300))


def _close_points(a, b, scale="log", span=None) -> tuple[int, int]:
    """(points where two series lie within the plot's resolution of each other, points both
    have): a series hidden under another at most of its steps shows it."""
    close = both = 0
    for u, v in zip(a, b):
        if u is None or v is None:
            continue
        both += 1
        close += _close(u, v, scale, span)
    return close, both


def _span(series):
    vals = [v for _, ys, _ in series for v in ys if v is not None]
    return (max(vals) - min(vals)) if vals else 0.0


def series_marks(steps, series, scale="log", *, every_max=40) -> list:
    """Line marks for ``[(key, values, style), ...]`` (or ``(key, values, style, steps)`` with
    their own steps) drawn in that order. A series that coincides with earlier ones (same steps,
    values within the plot's resolution) is drawn hollow and dashed over them, its markers a size
    larger for each earlier one (concentric, so every colour shows), and its legend entry names the
    first of them."""
    marks = []
    span = _span([(k, ys, st) for k, ys, st, *_ in series]) if scale != "log" else None
    drawn = []
    for k, (key, ys, st, *own) in enumerate(series):
        xs = list(own[0]) if own else list(steps)
        n = len(xs)
        stride = 1 if n <= every_max else math.ceil(n / 20)
        under = [(dk, c) for dk, dxs, dys in drawn
                 if dxs == xs and (c := coincident(dys, ys, scale, span))]
        label = str(key)
        if under:
            label = f"{key} ({under[0][1]} {under[0][0]}{' at every step' if n > 1 else ''})"
        else:                   # under an earlier series at most steps: drawn over it, and said
            part = [(dk, *cb) for dk, dxs, dys in drawn if dxs == xs
                    for cb in [_close_points(dys, ys, scale, span)] if cb[0] >= max(2, cb[1] / 2)]
            if part:
                under = part[:1]
                label = f"{key} (≈ {part[0][0]} at {part[0][1]} of {part[0][2]} steps)"
        dash = st.get("dash")
        if under and not dash:
            dash = (4, 2)
        marks.append(Mark("line", xs, list(ys), colour=st["colour"], marker=st["marker"],
                          dash=dash, width=1.1 if under else 1.5, size=5.0 + 2.5 * len(under),
                          hollow=bool(under) or st["marker"] in ("x", "+"), label=label,
                          key=str(key), z=3 + k,
                          every=None if stride == 1 else ((k * 3) % stride, stride)))
        drawn.append((key, xs, ys))
    return marks


def _thresholds(items, unit="Å"):
    """hline marks for ``[(value, label), ...]`` (equal values share one line)."""
    merged = {}
    for val, label in items:
        if val is not None and val > 0:
            merged.setdefault(val, []).append(label)
    return [Mark("hline", y=[val], colour="#555555", dash=(4, 3), width=0.9, z=1,
                 note=f"{' / '.join(ls)} {val:g} {unit}") for val, ls in merged.items()]


def _log_axis(label, values=(), hi_min=10 * FLOOR):
    vals = [v for v in values if v is not None]
    hi = max(vals + [hi_min]) * 1.6
    return Axis(label, scale="log", lim=(FLOOR / 1.5, hi))


_FLOOR_NOTE = f" (≤ {FLOOR:g} Å on the bottom axis)"


# ------------------------------------------------------------------------------------ run charts

def _types(rec, key="deformation"):
    f0 = rec["frames"][0].get(key) or {}
    if rec["geometry"].get("dimension") == 2:
        return [t for t in ("op", "oc", "tp", "hp", "mirror") if t in f0]
    order = ("mP", "mS", "oP", "oS", "oI", "oF", "tP", "tI", "hR", "hP", "cP", "cI", "cF")
    return [t for t in order if t in f0] + [t for t in f0 if t not in order]


def _type_series(rec, key):
    frames = rec["frames"]
    return [(t, _floor([(f.get(key) or {}).get(t) for f in frames]), style.type_style(t))
            for t in _types(rec, key)]


def deformation(rec) -> Chart:
    """Deformation (Å on spglib's symprec scale; what the flags use) to each type against step."""
    frames, dim = rec["frames"], rec["geometry"].get("dimension")
    steps = _steps(frames)
    series = _type_series(rec, "deformation")
    thr = [(config_number(rec, "rules", "lattice", "within"), "held within"),
           (config_number(rec, "rules", "lattice", "start_away"), "start away")]
    if dim == 2:
        thr.append((config_number(rec, "rules", "handedness_flip", "min_chiral"), "min chiral"))
    marks = _thresholds(thr) + series_marks(steps, series)
    vals = [v for _, ys, _ in series for v in ys]
    what = "each 2D Bravais type and the nearest mirror lattice" if dim == 2 else \
        "each of the 13 Bravais types"
    panel = Panel(step_axis(steps, rec=rec), _log_axis("deformation (Å)", vals), marks,
                  title=f"deformation to {what}{_FLOOR_NOTE}", legend="below")
    return Chart("deformation", [panel], height=360 if dim == 2 else 400)


def distance(rec) -> Chart:
    """Root-space distance (Å) to each 2D type (layers) or to each lattice system (bulk)."""
    frames, dim = rec["frames"], rec["geometry"].get("dimension")
    steps = _steps(frames)
    if dim == 2:
        series = _type_series(rec, "distance")
        title = "root-space distance to each 2D Bravais type" + _FLOOR_NOTE
    else:
        systems = list(frames[0].get("systems") or {})
        series = [(s, _floor([(f.get("systems") or {}).get(s) for f in frames]),
                   style.system_style(s)) for s in systems]
        title = "root-space distance to each lattice system (its nearest type)" + _FLOOR_NOTE
    if not series:
        return None
    vals = [v for _, ys, _ in series for v in ys]
    panel = Panel(step_axis(steps, rec=rec), _log_axis("distance (Å, root space)", vals),
                  series_marks(steps, series), title=title, legend="below")
    return Chart("distance", [panel], height=340)


def chirality(rec) -> Chart | None:
    """Layers: signed chiral distance (the record's ``chiral_distance``, Å) and signed deformation to
    the nearest mirror lattice (sign × deformation, Å; what the handedness-flip rule uses)."""
    if rec["geometry"].get("dimension") != 2:
        return None
    frames = rec["frames"]
    steps = _steps(frames)
    chi = [finite(f.get("chiral_distance")) for f in frames]
    sdef = [None if finite((f.get("deformation") or {}).get("mirror")) is None else
            (f.get("sign") or 0) * finite(f["deformation"]["mirror"]) for f in frames]
    if all(v is None for v in chi):
        return None
    mc = config_number(rec, "rules", "handedness_flip", "min_chiral")
    top = max([abs(v) for v in chi + sdef if v is not None] + [(mc or 0) * 1.5, 1e-3]) * 1.15
    xa = step_axis(steps, rec=rec)
    x0, x1 = xa.lim
    marks = [Mark("poly", [x0, x1, x1, x0], [0, 0, top, top], fill="#eef4fb", z=0),
             Mark("poly", [x0, x1, x1, x0], [0, 0, -top, -top], fill="#fbf1ea", z=0),
             Mark("hline", y=[0.0], colour="#000000", width=0.9, z=1,
                  note="sign 0: a mirror line")]
    if mc:
        marks += [Mark("hline", y=[s * mc], colour="#777777", dash=(4, 3), width=0.8, z=1,
                       note=f"{'+' if s > 0 else '−'}min chiral {mc:g} Å") for s in (1, -1)]
    hand = ((rec.get("summary") or {}).get("verdict") or {}).get("lattice", {}).get("handedness")
    if isinstance(hand, dict) and hand.get("frame") is not None and hand["frame"] < len(frames):
        st = steps[hand["frame"]]
        marks.append(Mark("vline", x=[st], colour="#b35806", width=1.0, dash=(2, 2), z=1,
                          note=f"handedness reversed at step {st}"))
    marks += [Mark("text", [0.01], [0.97], texts=["sign +1"], coords="axes", valign="top",
                   colour="#1d4f86", fontsize=9),
              Mark("text", [0.01], [0.03], texts=["sign −1 (mirror image)"], coords="axes",
                   valign="bottom", colour="#8a4a1d", fontsize=9)]
    marks += series_marks(steps, [("chiral distance (root space)", chi, style.CELL_STYLE["chiral"]),
                                  ("chiral_def (sign × deformation to mirror)", sdef,
                                   style.CELL_STYLE["chiral_deformation"])], scale="linear")
    ya = Axis("sign × distance to mirror lattice (Å)", lim=(-top, top),
              symmetric=True)
    return Chart("chirality", [Panel(xa, ya, marks, title="handedness: signed chiral distance",
                                     legend="below")], height=340)


def _cell_panel(steps, cp, keys, label, title, min_span, rec=None):
    series = [(k, [None if not np.isfinite(v) else float(v) for v in cp[k]],
               style.CELL_STYLE[k]) for k in keys]
    names = {"alpha": "α", "beta": "β", "gamma": "γ"}
    marks = series_marks(steps, [(names.get(k, k), ys, st) for k, ys, st in series], "linear")
    return Panel(step_axis(steps, rec=rec), Axis(label, min_span=min_span), marks, title=title,
                 legend="below")


def cell(rec) -> Chart | None:
    """Cell parameters of the Selling-reduced cell per step, derived from the invariants
    (:func:`driftwatch.tables.cell_parameters`): lengths, angles, area or volume."""
    from ..tables import cell_parameters
    frames, dim = rec["frames"], rec["geometry"].get("dimension")
    cp = cell_parameters(rec)
    if not np.isfinite(cp["a"]).any():
        return None
    steps = _steps(frames)
    if dim == 2:
        specs = [(("a", "b"), "length (Å)", "a ≤ b", 0.02),
                 (("gamma",), "angle (°)", "γ (obtuse)", 0.2),
                 (("area",), "area (Å²)", "area", 0.005 * float(np.nanmax(cp["area"])))]
    else:
        specs = [(("a", "b", "c"), "length (Å)", "a ≤ b ≤ c", 0.02),
                 (("alpha", "beta", "gamma"), "angle (°)", "angles, sorted: α ≤ β ≤ γ (all ≥ 90°)",
                  0.2),
                 (("volume",), "volume (Å³)", "volume", 0.005 * float(np.nanmax(cp["volume"])))]
    panels = [_cell_panel(steps, cp, *spec, rec=rec) for spec in specs]
    return Chart("cell", panels, width=980, height=300,
                 title="Selling-reduced cell (derived from the record's invariants)")


def energy(rec) -> Chart | None:
    """Energy relative to the last step (eV) and the largest force on an atom (eV/Å, log)."""
    frames = rec["frames"]
    steps = _steps(frames)
    en = [finite(f.get("energy")) for f in frames]
    fm = [finite(f.get("fmax")) for f in frames]
    panels = []
    if any(v is not None for v in en):
        last = next(v for v in reversed(en) if v is not None)
        rel = [None if v is None else v - last for v in en]
        panels.append(Panel(step_axis(steps, rec=rec),
                            Axis("E − E(last step) (eV)", min_span=1e-3),
                            series_marks(steps, [("energy", rel, style.CELL_STYLE["energy"])],
                                         "linear"),
                            title=f"energy (last step {last:.6f} eV)", legend=None))
    pos = [v if v is not None and v > 0 else None for v in fm]
    if all(v is None for v in pos) and any(v == 0 for v in fm):
        panels.append(Panel(step_axis(steps, rec=rec),
                            Axis("max force (eV/Å)", lim=(-1, 1), ticks=[0]),
                            [Mark("hline", y=[0.0], colour=style.CELL_STYLE["fmax"]["colour"],
                                  width=1.5),
                             Mark("text", [0.5], [0.6], coords="axes", anchor="middle",
                                  texts=["the file gives 0 eV/Å at every step",
                                         "(e.g. every force vanishes by symmetry)"],
                                  colour="#444444", fontsize=10)],
                            title="largest force on an atom", legend=None))
    elif any(v is not None for v in pos):
        vals = [v for v in pos if v is not None]
        lo, hi = min(vals), max(vals)
        lo, hi = (lo / 2, hi * 2) if hi / lo < 100 else (lo / 1.5, hi * 1.5)
        panels.append(Panel(step_axis(steps, rec=rec),
                            Axis("max force (eV/Å)", scale="log", lim=(lo, hi)),
                            series_marks(steps, [("max force", pos, style.CELL_STYLE["fmax"])]),
                            title="largest force on an atom", legend=None))
    if not panels:
        return None
    return Chart("energy", panels, width=980 if len(panels) > 1 else 620, height=290)


# --------------------------------------------------------------------------------- spglib charts

def _edges(s):
    s = np.asarray(s, float)
    if len(s) == 1:
        return np.array([s[0] / 1.5, s[0] * 1.5])
    mid = np.sqrt(s[1:] * s[:-1])
    return np.concatenate([[s[0] ** 2 / mid[0]], mid, [s[-1] ** 2 / mid[-1]]])


_ALIASES = {"oC": "oS", "oA": "oS", "oB": "oS", "mC": "mS", "mA": "mS", "mB": "mS", "mI": "mS"}


def _verdict(spec, i, what, kind):
    """(legend label, colour, short text) of spglib's verdict at grid index i."""
    if what == "group":
        g = int(spec["group"][i] or 0)
        if not g:
            return "failed (spglib)", style.FAILED_COLOUR, "—"
        return f"{spec['group_symbol'][i]} ({g})", style.group_colour(g, kind), str(g)
    lat = (spec.get("lattice") or [None] * len(spec["symprec"]))[i]
    if not lat:
        return "failed (spglib)", style.FAILED_COLOUR, "—"
    return str(lat), style.type_style(_ALIASES.get(lat, lat))["colour"], str(lat)


def spectrum(rec, common=()) -> Chart | None:
    """spglib's verdict across symprec (log, Å) for each frame it was asked about: one column per
    frame (named by its step), the structure's group on the left, the lattice alone on the right."""
    rows = [(int(f.get("step", i)), f["symmetry"]) for i, f in enumerate(rec["frames"])
            if f.get("symmetry") and f["symmetry"].get("symprec")]
    if not rows:
        return None
    kind = "layer" if (rows[0][1].get("group_kind") == "layer"
                       or rec["geometry"].get("dimension") == 2) else "space"
    lo = min(_edges(s["symprec"])[0] for _, s in rows)
    hi = max(_edges(s["symprec"])[-1] for _, s in rows)
    panels = []
    for what in ("group", "lattice"):
        rx0, rx1, ry0, ry1, cols, texts, tips, keys = [], [], [], [], [], [], [], {}
        bx, by = [], []
        for c, (st, spec) in enumerate(rows):
            e = _edges(spec["symprec"])
            labs = [_verdict(spec, i, what, kind) for i in range(len(spec["symprec"]))]
            i = 0
            while i < len(labs):
                j = i
                while j + 1 < len(labs) and labs[j + 1][0] == labs[i][0]:
                    j += 1
                rx0.append(c - 0.4), rx1.append(c + 0.4), ry0.append(e[i]), ry1.append(e[j + 1])
                cols.append(labs[i][1]), texts.append(labs[i][2])
                tips.append(f"step {st}: {labs[i][0]} from {spec['symprec'][i]:.3g} to "
                            f"{spec['symprec'][j]:.3g} Å")
                keys.setdefault(labs[i][0], labs[i][1])
                i = j + 1
            for b in spec.get("breakpoints") or []:
                if b.get("kind") == what and b.get("low") and b.get("high"):
                    bx.append(c), by.append(math.sqrt(b["low"] * b["high"]))
        marks = [Mark("rects", rx0, ry0, x1=rx1, y1=ry1, colours=cols, texts=texts, tips=tips,
                      z=1, key=what)]
        if bx:
            marks.append(Mark("points", bx, by, marker="_", size=14, colour="#000000", width=2.0,
                              z=4, key="breakpoints"))
        for val in common:
            if lo <= val <= hi:
                marks.append(Mark("hline", y=[val], colour="#000000", dash=(1, 2), width=0.7,
                                  z=3, note=f"{val:g}" if what == "lattice" else None))
        marks += [Mark("key", colour=col, label=lab, patch=True) for lab, col in keys.items()]
        if bx:
            marks.append(Mark("key", colour="#000000", marker="_", size=14, width=2.0,
                              label="breakpoint (centre of its bracket)"))
        ticks = list(range(len(rows)))
        xa = Axis(END_POINTS_AXIS if rec["run"].get("kind") == "end-points" else
                  "ionic step (frames spglib was asked about)", scale="category",
                  lim=(-0.6, len(rows) - 0.4), ticks=ticks, ticklabels=[str(st) for st, _ in rows],
                  grid=False)
        ya = Axis("symprec (Å)", scale="log", lim=(lo, hi), grid=False)
        title = ("structure: layer group" if kind == "layer" else "structure: space group") \
            if what == "group" else "lattice alone: Bravais type"
        panels.append(Panel(xa, ya, marks, title=title, legend="below"))
    return Chart("spectrum", panels, width=900, height=420)


def displacement(rec) -> Chart | None:
    """RMS (solid) and max (dashed) atomic displacement (Å) to each group spglib found, per step."""
    frames = rec["frames"]
    kind = "layer" if rec["geometry"].get("dimension") == 2 else "space"
    series, symbols = {}, {}     # one series per instance of a group: (number, operations)
    for i, f in enumerate(frames):
        disp = (f.get("symmetry") or {}).get("displacement") or {}
        for key, d in disp.items():
            if not isinstance(d, dict) or "rms" not in d:
                continue
            g = int(d.get("group") or str(key).split("/")[0] or 0)
            symbols[g] = d.get("symbol", "?")
            series.setdefault((g, d.get("operations")), []).append(
                (int(f.get("step", i)), d["rms"], d.get("max")))
    first = int(frames[0].get("step", 0)) if frames else 0
    for d in ((frames[-1].get("symmetry") or {}).get("displacement") or {}).values():
        st = d.get("start") if isinstance(d, dict) else None   # the first frame, on the final
        g = int(d.get("group") or 0) if isinstance(d, dict) else 0   # structure's instance
        pts = series.get((g, d.get("operations"))) if g else None
        if pts is not None and "rms" in (st or {}) and all(p[0] != first for p in pts):
            pts.append((first, st["rms"], st["max"]))
    if not series:
        return None
    several = {g for g, _ in series if sum(1 for h, _ in series if h == g) > 1}
    lines, vals, steps_all, maxes = [], [], [], []
    for (g, ops), pts in sorted(series.items(), key=lambda kv: (kv[0][0], kv[0][1] or 0)):
        lab = group_name(symbols[g], g, ops if g in several else None)
        pts.sort()
        st = [p[0] for p in pts]
        steps_all += st
        rms, mx = _floor([p[1] for p in pts]), _floor([p[2] for p in pts])
        vals += rms + mx
        col = style.group_colour(g, kind)
        same = coincident(rms, mx, "log") is not None
        more = g in several and ops != min(k or 0 for h, k in series if h == g)
        key = f"{g}/{ops}" if more else str(g)     # a further instance: squares, same colour
        lines.append((lab, rms, {"colour": col, "marker": "s" if more else "o", "dash": None},
                      st, key))
        if not same:      # max drawn only where it differs from the RMS
            maxes.append((f"{key} max", mx, {"colour": col, "marker": "v", "dash": (4, 2)}, st))
    marks = series_marks(None, [ln[:4] for ln in lines])
    for m, ln in zip(marks, lines):
        m.key = str(ln[4])
    for k, (key, mx, st, xs) in enumerate(maxes):
        marks.append(Mark("line", xs, mx, colour=st["colour"], marker="v", dash=(4, 2), width=1.0,
                          hollow=True, size=6.0, z=50 + k, key=key))
    marks += [Mark("key", colour="#444444", marker="o", label="solid: RMS"),
              Mark("key", colour="#444444", marker="v", dash=(4, 2), hollow=True,
                   label="dashed: max" + (" (not drawn where max = RMS)"
                                          if len(maxes) < len(lines) else ""))]
    panel = Panel(step_axis(sorted(set(steps_all)), rec=rec), _log_axis("displacement (Å)", vals),
                  marks,
                  title="atomic displacement to each group spglib found" + _FLOOR_NOTE,
                  legend="right")
    return Chart("displacement", [panel], height=330)


# --------------------------------------------------------------------------------------- layer map

def _effective_signs(signs):
    """Sign used to place each frame in the two-sided map: 0 (on a boundary) takes the previous sign."""
    out, last = [], None
    for s in signs:
        if s:
            last = 1 if s > 0 else -1
        out.append(last)
    first = next((s for s in out if s), 1)
    return np.array([first if s is None else s for s in out], float)


def _jump(p, q):
    """True if the shortest mirror path from frame p to q (opposite signs) crosses y=0 or x+y=1.

    Reflect q in each edge of the projected-invariant triangle and take the nearest image; only
    crossings of x=0 are continuous in the signed plane, the other two edges appear once per half.
    """
    (x0, y0), (x1, y1) = p, q
    images = {"x": (-x1, y1), "y": (x1, -y1), "d": (1 - y1, 1 - x1)}
    best = min(images, key=lambda k: math.hypot(images[k][0] - x0, images[k][1] - y0))
    return best != "x"


def _map_frame(labels):
    op, oc = style.type_style("op"), style.type_style("oc")
    tp, hp = style.type_style("tp"), style.type_style("hp")
    m = [Mark("poly", [0, 1, 0], [0, 0, 1], fill="#eef4fb", z=0),
         Mark("poly", [0, -1, 0], [0, 0, 1], fill="#fbf1ea", z=0),
         Mark("line", [-1, 1], [0, 0], colour=op["colour"], width=2.6, z=1, key="op"),
         Mark("line", [0, 0], [0, 1], colour=oc["colour"], width=2.6, z=1, key="oc"),
         Mark("line", [1, 0, -1], [0, 1, 0], colour=oc["colour"], width=2.6, z=1, key="oc"),
         Mark("points", [0], [0], marker="s", colour=tp["colour"], size=11, z=3, key="tp"),
         Mark("points", [0], [1], marker="h", colour=hp["colour"], size=13, z=3, key="hp")]
    if labels:
        t = dict(fontsize=9, z=4)
        m += [Mark("text", [0], [0], texts=["tp square (0, 0)"], anchor="middle", valign="top",
                   offset=(0, -12), colour=tp["colour"], **t),
              Mark("text", [0], [1], texts=["hp hexagonal (0, 1)"], anchor="middle",
                   valign="bottom", offset=(0, 10), colour=hp["colour"], **t)]
        for sx in (1, -1):
            m += [Mark("text", [0.56 * sx], [-0.03], texts=["op rectangular (y = 0)"],
                       anchor="middle", valign="top", colour=op["colour"], **t),
                  Mark("text", [0.5 * sx + 0.03 * sx], [0.5 + 0.03], texts=[
                      "oc centred rectangular (x + y = 1)"], anchor="middle", valign="bottom",
                      rotation=-45 * sx, colour=oc["colour"], **t)]
        m += [Mark("text", [0.015], [0.34], texts=["oc centred", "rectangular", "(x = 0)"],
                   valign="center", colour=oc["colour"], fontsize=8.5, z=4),
              Mark("text", [0.62], [0.86], texts=["sign +1"], anchor="middle", colour="#1d4f86",
                   fontsize=10, z=4),
              Mark("text", [-0.62], [0.86], texts=["sign −1 (mirror images)"], anchor="middle",
                   colour="#8a4a1d", fontsize=10, z=4)]
    return m


def _map_path(h, v, s, xy, steps, big):
    """The path: solid where it is continuous in the signed plane, dotted where it crosses an edge
    that appears once per half (the lattice is the same; the picture jumps to the other half)."""
    marks = []
    jump = [bool(s[i] != s[i + 1] and _jump(xy[i], xy[i + 1])) for i in range(len(h) - 1)]
    for dotted in (False, True):
        px, py = [], []
        for i in range(len(h) - 1):
            if jump[i] == dotted:
                px += [float(h[i]), float(h[i + 1]), None]
                py += [float(v[i]), float(v[i + 1]), None]
        if px:
            marks.append(Mark("line", px, py, colour="#555555" if dotted else "#222222",
                              width=0.9 if dotted else 1.2, dash=(1, 2) if dotted else None, z=2,
                              key="path across an edge" if dotted else "path"))
    lo, hi = min(steps), max(steps)
    cols = [style.viridis(0.0 if hi == lo else (st - lo) / (hi - lo)) for st in steps]
    marks.append(Mark("points", list(h), list(v), marker="o", size=4.5 if big else 6, colours=cols,
                      z=5, tips=[f"step {st}" for st in steps], key="path"))
    marks.append(Mark("points", [h[0]], [v[0]], marker="o", size=11, hollow=True, width=1.5,
                      colour="#000000", z=6, label=f"start (step {steps[0]})"))
    marks.append(Mark("points", [h[-1]], [v[-1]], marker="*", size=14, colour="#D55E00",
                      edge="#000000", z=7, label=f"end (step {steps[-1]})"))
    return marks


def layer_map(rec) -> Chart | None:
    """The layer's path on the projected-invariant map, both handedness halves (sign × x, y).

    The right half holds sign +1 lattices, the left half their mirror images. Boundaries (sign 0):
    x = 0 and the slanted edges are centred rectangular (oc), the bottom edge rectangular (op);
    square (tp) at (0, 0), hexagonal (hp) at (0, 1). A zoom panel follows the path when it is small
    on the map or changes sign.
    """
    if rec["geometry"].get("dimension") != 2:
        return None
    frames = rec["frames"]
    if not all(f.get("projected") for f in frames):
        return None
    xy = np.array([f["projected"] for f in frames], float)
    s = _effective_signs([f.get("sign", 0) for f in frames])
    h, v = s * xy[:, 0], xy[:, 1]
    steps = _steps(frames)
    span = max(np.ptp(h), np.ptp(v))
    flips = np.nonzero(s[1:] != s[:-1])[0]
    still = span < 1e-9
    zoom = not still and (bool(flips.size) or span < 0.3)
    main = Panel(Axis("sign × x   (projected invariant, unitless)", lim=(-1.06, 1.06), grid=False),
                 Axis("y", lim=(-0.12, 1.12), grid=False), _map_frame(True), equal=True,
                 legend=None if zoom else "below", weight=1.75)
    lo, hi = min(steps), max(steps)
    cbar = {"label": "ionic step", "lo": lo, "hi": hi} if hi > lo else None
    if not zoom:
        main.marks += _map_path(h, v, s, xy, steps, big=True)
        main.colorbar = cbar
        return Chart("layer_map", [main], width=700, height=400)
    k0 = int(flips[0]) if flips.size else 0
    hz, vz = h[k0:], v[k0:]
    if flips.size:
        hx, hy = max(0.62 * np.ptp(hz), 1e-4), max(0.62 * np.ptp(vz), 1e-4)
        note = f"zoom from step {steps[k0]} (sign changes); scales differ"
    else:
        hx = hy = max(0.66 * span, 0.004)
        note = f"zoom (box on the left), width {2 * hx:.3g}"
    cx, cy = (hz.max() + hz.min()) / 2, (vz.max() + vz.min()) / 2
    bx, by = max(hx, 0.012), max(hy, 0.012)
    main.marks += _map_path(h, v, s, xy, steps, big=True)
    main.marks.append(Mark("poly", [cx - bx, cx + bx, cx + bx, cx - bx],
                           [cy - by, cy - by, cy + by, cy + by], edge="#000000", width=0.9, z=8))
    zm = _map_frame(False) + _map_path(h, v, s, xy, steps, big=False)
    if flips.size:
        zm.append(Mark("line", [0, 0], [cy - 2 * hy, cy + 2 * hy], colour=style.type_style("oc")[
            "colour"], width=2.6, z=1, key="oc"))
    zpanel = Panel(Axis("sign × x", lim=(cx - hx, cx + hx), grid=False),
                   Axis("y", lim=(cy - hy, cy + hy), grid=False), zm, title=note,
                   equal=not flips.size, legend="below", weight=1.0, colorbar=cbar)
    return Chart("layer_map", [main, zpanel], width=1000, height=430)


# ------------------------------------------------------------------------------------ all of a run

def run_charts(rec, common=()) -> dict:
    """Every chart of a run page, by name (None where a chart does not apply)."""
    return {"layer_map": layer_map(rec), "deformation": deformation(rec), "distance": distance(rec),
            "chirality": chirality(rec), "cell": cell(rec), "energy": energy(rec),
            "spectrum": spectrum(rec, common), "displacement": displacement(rec)}


# ---------------------------------------------------------------------------------------- campaign

def scatter_points(items) -> list:
    """Points of :func:`campaign_scatter` from ``[(name, href, record or digest), ...]``: the drift
    (``summary.drift``: the deformation at the first and last step to the verdict's type) and the
    root-space distance to that type at the first and last frame."""
    pts = []
    for name, href, r in items:
        d = r["summary"].get("drift") or {}
        t = d.get("type")
        if not t:
            continue
        f0, f1 = r["frames"][0], r["frames"][-1]
        v = r["summary"]["verdict"]
        pts.append({"name": name, "href": href, "type": t, "verdict": v["direction"],
                    "fixed_cell": bool(r["run"].get("fixed_cell")),
                    "dim": r["geometry"].get("dimension"), "def0": d.get("initial"),
                    "def1": d.get("final"), "dist0": (f0.get("distance") or {}).get(t),
                    "dist1": (f1.get("distance") or {}).get(t)})
    return pts


RINGS = 3
"""Runs drawn under another at one point of the campaign scatter show as rings, up to this many;
beyond, the point says how many runs it holds (thousands of runs of one fixed cell end at the
floor together: a ring each had covered the panel)."""


def campaign_scatter(points) -> Chart:
    """Initial against final deformation (left) and root-space distance (right), Å, to the type each
    run's verdict is about. ``points``: dicts {name, href, verdict, fixed_cell, dim, type, def0,
    def1, dist0, dist1}; every point links to its run page and carries its name (tooltip; label
    for ≤ 30 runs). A fixed-cell run whose group changed (its atoms moved: its lattice cannot) is
    drawn hollow: on the diagonal, yet not unchanged."""
    short = _short_names([p["name"] for p in points])
    points = [dict(p, short=s) for p, s in zip(points, short)]
    panels = []
    for what, k0, k1 in (("deformation", "def0", "def1"), ("root-space distance", "dist0", "dist1")):
        pts = [p for p in points if finite(p.get(k0)) is not None and finite(p.get(k1)) is not None]
        marks = []
        hi = max([max(finite(p[k0]), finite(p[k1])) for p in pts] + [1e-2]) * 2
        lo = FLOOR / 1.5
        marks.append(Mark("line", [lo, hi], [lo, hi], colour="#999999", dash=(4, 3), width=0.8,
                          z=1))
        mid = math.sqrt(lo * hi)
        marks.append(Mark("text", [mid], [mid], texts=["lattice did not move"], anchor="start",
                          valign="top", colour="#666666", fontsize=8.5, offset=(4, -4)))
        label = len(pts) <= 30
        atoms_only = lambda p: p["verdict"] != "kept" and bool(p.get("fixed_cell"))
        groups = [(verdict, dim, marker, by_atoms,
                   [p for p in pts if p["verdict"] == verdict and p.get("dim") == dim
                    and atoms_only(p) == by_atoms])
                  for verdict in ("gained", "lost", "changed", "kept")
                  for by_atoms in ((False, True) if verdict != "kept" else (False,))
                  for dim, marker in ((2, "o"), (3, "s"))]
        xy = lambda p: (max(finite(p[k0]), FLOOR), max(finite(p[k1]), FLOOR))
        at: dict = {}                 # runs at one point, in drawing order (the last on top)
        for *_, sel in groups:
            for p in sel:
                at.setdefault(tuple(round(math.log10(v) / 0.05) for v in xy(p)), []).append(p)
                #                            (0.05 decade: a few px, where markers hide another)
        same = {id(p): ps for ps in at.values() if len(ps) > 1 for p in ps}
        tip = lambda p, verdict: (f"{p['name']}: {verdict}, {p.get('type')} {finite(p[k0]):.3g} "
                                  f"→ {finite(p[k1]):.3g} Å")
        for verdict, dim, marker, by_atoms, sel in groups:
            if not sel:
                continue
            colour = style.VERDICT_COLOURS.get(verdict, "#777777")
            kind = f"{'layer' if dim == 2 else 'bulk'}{', fixed cell' if by_atoms else ''}"
            # runs at one point: the top one names them all; those under it show as rings
            names = [(" = ".join(q["short"] for q in same[id(p)]) if same[id(p)][-1] is p else "")
                     if id(p) in same else p["short"] for p in sel]
            marks.append(Mark(
                "points", [xy(p)[0] for p in sel], [xy(p)[1] for p in sel], marker=marker,
                size=7.5, colour=colour, edge="#222222", z=3, hollow=by_atoms,
                label=f"{verdict} ({kind})", links=[p.get("href") for p in sel],
                tips=[tip(p, verdict) for p in sel], texts=names if label else None,
                offset=(6, 3), key=f"{verdict}-{dim}{'-atoms' if by_atoms else ''}"))
            for p in sel:
                under = same.get(id(p), [p])
                k = len(under) - 1 - under.index(p)         # how many runs lie on top of it
                if 0 < k <= RINGS:
                    marks.append(Mark("points", [xy(p)[0]], [xy(p)[1]], marker=marker,
                                      size=7.5 + 4.0 * k, colour=colour, hollow=True, z=4,
                                      links=[p.get("href")], tips=[tip(p, verdict)]))
        for ps in at.values():                # more runs at one point than rings: their count
            if len(ps) > RINGS + 1:
                x, y = xy(ps[-1])
                marks.append(Mark("text", [x], [y], texts=[f"×{len(ps)}"], anchor="start",
                                  colour="#222222", fontsize=8.5, offset=(7.5 + 4.0 * RINGS, -6),
                                  z=5))
        ax = Axis(f"{what} at the first step (Å)", scale="log", lim=(lo, hi))
        ay = Axis(f"{what} at the last step (Å)", scale="log", lim=(lo, hi))
        panels.append(Panel(ax, ay, marks, title=f"{what} to the type of each run's verdict",
                            legend="below" if what == "deformation" else None, equal=True))
    return Chart("campaign", panels, width=1100, height=600)


def _short_names(names):
    """Names without the prefix they all share (up to a '/' or '_'), for point labels."""
    import os
    pre = os.path.commonprefix(list(names)) if len(names) > 1 else ""
    cut = max(pre.rfind("/"), pre.rfind("_")) + 1
    out = [n[cut:] for n in names]
    return out if all(out) else list(names)


def breakpoint_histogram(group_bps, lattice_bps, common, span) -> Chart:
    """Where spglib's verdict changes (geometric centre of each bracket, Å), pooled over runs."""
    allv = [v for v in list(group_bps) + list(lattice_bps) if v and v > 0]
    lo = min([span[0]] + allv) / 1.2
    hi = max([span[1]] + allv) * 1.2
    edges = np.geomspace(lo, hi, 31)
    g = np.histogram([v for v in group_bps if v and v > 0], edges)[0]
    l_ = np.histogram([v for v in lattice_bps if v and v > 0], edges)[0]
    marks = [Mark("rects", list(edges[:-1]), [0] * 30, x1=list(edges[1:]), y1=[int(x) for x in g],
                  colour=style.SYSTEM_SHADES["monoclinic"][1], label="structure (group changes)",
                  key="group", edge="#ffffff"),
             Mark("rects", list(edges[:-1]), [int(x) for x in g], x1=list(edges[1:]),
                  y1=[int(a + b) for a, b in zip(g, l_)], key="lattice", edge="#ffffff",
                  colour=style.SYSTEM_SHADES["orthorhombic"][2],
                  label="lattice alone (type changes)")][:2 if l_.any() else 1]
    for val in common:
        marks.append(Mark("vline", x=[val], colour="#000000", dash=(1, 2), width=0.8,
                          note=f"{val:g}"))
    top = max([int(a + b) for a, b in zip(g, l_)] + [1])
    panel = Panel(Axis("symprec where spglib's verdict changes (Å, final frame of each run)",
                       scale="log", lim=(lo, hi)),
                  Axis("breakpoints", lim=(0, top * 1.1), integer=True), marks, legend="below",
                  title="breakpoints across the campaign")
    return Chart("breakpoints", [panel], width=620, height=360)


def flag_bars(counts: dict, levels: dict) -> Chart:
    """Runs carrying each flag code (horizontal bars: orange lattice or group, blue tolerance or
    code)."""
    codes = list(counts)
    n = len(codes)
    cols = [style.VERDICT_COLOURS["changed"] if levels.get(c) in ("lattice", "structure")
            else "#56B4E9" for c in codes]
    y = [n - 1 - i for i in range(n)]
    marks = [Mark("rects", [0] * n, [v - 0.38 for v in y], x1=[counts[c] for c in codes],
                  y1=[v + 0.38 for v in y], colours=cols, texts=[str(counts[c]) for c in codes],
                  key="flags", outside=True)]
    marks += [Mark("key", colour=style.VERDICT_COLOURS["changed"], label="lattice or group",
                   patch=True),
              Mark("key", colour="#56B4E9", label="tolerance or code", patch=True)]
    top = max(list(counts.values()) + [1])
    panel = Panel(Axis("runs with the flag", lim=(0, top * 1.15), integer=True),
                  Axis("", scale="category", lim=(-0.6, n - 0.4), ticks=y, ticklabels=codes,
                       grid=False), marks, legend="below", title="runs per flag")
    return Chart("flags", [panel], width=620, height=int(90 + 26 * max(n, 2)))
