"""Plots for the HTML report: matplotlib ``Figure`` objects (no pyplot, Agg/SVG) -> inline SVG text.

Every function takes plain data read from run records and returns an SVG fragment (a string) ready to be
placed inside an HTML page: no XML prolog, no metadata, no comments, element ids prefixed so that several
figures can share a page. Mathtext and TeX are off for every text element (``text.parse_math=False``,
``text.usetex=False``), so a ``$`` that came from an input file is drawn as a dollar sign and never parsed.
Lengths are Å; values at or below :data:`FLOOR` are drawn on the bottom axis of the log plots.
"""

from __future__ import annotations

import contextlib
import io
import itertools
import math
import re

import numpy as np

__all__ = ["FLOOR", "session", "reset_ids", "layer_map", "deformation_plot", "distance_plot",
           "spectrum_plot", "displacement_plot", "campaign_scatter", "breakpoint_histogram",
           "flag_bars", "text_safe"]

FLOOR = 1e-6
"""Å. Log plots draw values at or below this on the bottom axis (a lattice *at* a type has 0)."""

_RC = {"text.parse_math": False, "text.usetex": False, "svg.fonttype": "none",
       "svg.hashsalt": "driftwatch", "font.family": "sans-serif", "font.sans-serif": ["DejaVu Sans"],
       "font.size": 9, "axes.titlesize": 10, "axes.labelsize": 9, "legend.fontsize": 8,
       "xtick.labelsize": 8, "ytick.labelsize": 8, "axes.grid": True, "grid.alpha": 0.25,
       "axes.spines.top": False, "axes.spines.right": False, "figure.dpi": 100}
"""matplotlib settings of every report figure: no mathtext/TeX (input text is drawn as is), SVG text
as <text> elements (small pages, escaped by matplotlib's XML writer), fixed hash salt (same input,
same bytes)."""

# Categorical palette: Okabe-Ito colours (yellow darkened for contrast on white), then extra tints.
PALETTE = ["#0072B2", "#E69F00", "#009E73", "#CC79A7", "#56B4E9", "#D55E00", "#b8860b", "#000000",
           "#999999", "#8c564b", "#17becf", "#bcbd22", "#6a3d9a", "#1f77b4", "#ff7f0e"]
TYPE_COLOURS = dict(zip(["op", "oc", "tp", "hp", "mirror"], PALETTE))
VERDICT_COLOURS = {"gained": "#D55E00", "lost": "#CC79A7", "changed": "#E69F00",
                   "kept": "#009E73"}
_counter = itertools.count(1)


def reset_ids():
    """Start element-id prefixes afresh (call once per page: ids need only be unique in a page)."""
    global _counter
    _counter = itertools.count(1)


def text_safe(s) -> str:
    """A string from an input file made safe for a matplotlib text element (no mathtext, no control chars)."""
    s = "" if s is None else str(s)
    s = "".join(c if c.isprintable() else " " for c in s)
    return s.replace("$", r"\$") if _RC["text.parse_math"] else s


def _mpl():
    import matplotlib
    from matplotlib.figure import Figure
    return matplotlib, Figure


def _svg(fig) -> str:
    """SVG text of a figure as an inline fragment with page-unique ids."""
    buf = io.StringIO()
    with _ctx():
        fig.savefig(buf, format="svg", metadata={"Date": None, "Creator": None, "Format": None,
                                                 "Type": None})
    svg = buf.getvalue()
    svg = re.sub(r"<\?xml.*?\?>", "", svg, flags=re.S)
    svg = re.sub(r"<!DOCTYPE.*?>", "", svg, flags=re.S)
    svg = re.sub(r"<metadata>.*?</metadata>", "", svg, flags=re.S)
    svg = re.sub(r"<!--.*?-->", "", svg, flags=re.S)
    pre = f"f{next(_counter)}-"
    svg = re.sub(r'\bid="', f'id="{pre}', svg)
    svg = re.sub(r'href="#', f'href="#{pre}', svg)
    svg = re.sub(r"url\(#", f"url(#{pre}", svg)
    svg = re.sub(r'<svg ', '<svg role="img" ', svg, count=1)
    return svg.strip()


def _figure(w, h, **margins):
    """A figure with fixed margins (fractions; no layout engine, so it is drawn once when saved)."""
    _, Figure = _mpl()
    with _ctx():
        fig = Figure(figsize=(w, h))
    fig.subplots_adjust(**({"left": 0.1, "right": 0.97, "bottom": 0.14, "top": 0.9} | margins))
    return fig


_active = [0]


@contextlib.contextmanager
def _ctx():
    """matplotlib settings of the report (re-entrant: one rcParams copy per :func:`session`)."""
    if _active[0]:
        yield
        return
    matplotlib, _ = _mpl()
    with matplotlib.rc_context(_RC):
        _active[0] += 1
        try:
            yield
        finally:
            _active[0] -= 1


session = _ctx
"""Context manager for building many plots under one copy of the report's matplotlib settings."""


def _floor(values):
    v = np.asarray([np.nan if x is None else x for x in values], float)
    return np.where(np.isfinite(v), np.maximum(v, FLOOR), np.nan)


def _plain_log(ax, axis="y"):
    """Log axis with plain tick labels (1e-05, 0.001, 0.1): mathtext is off, so no 10^k superscripts."""
    from matplotlib.ticker import FuncFormatter, LogLocator, NullLocator
    a = ax.yaxis if axis == "y" else ax.xaxis
    a.set_major_locator(LogLocator(base=10, numticks=12))
    a.set_major_formatter(FuncFormatter(lambda v, _: f"{v:g}"))
    a.set_minor_locator(NullLocator())


def _log_axis(ax, label):
    ax.set_yscale("log")
    _plain_log(ax)
    ax.set_ylabel(f"{label}\nbottom axis: ≤ {FLOOR:g} Å")
    lo, hi = ax.get_ylim()
    ax.set_ylim(FLOOR / 1.5, max(hi, 10 * FLOOR))


def _steps(frames):
    return np.array([f.get("step", f.get("index", i)) for i, f in enumerate(frames)], float)


def _thresholds(ax, lines):
    """Horizontal threshold lines: ``[(value Å, label), ...]``, labelled at the right edge."""
    merged = {}
    for val, label in lines:
        if val is not None and val > 0:
            merged.setdefault(val, []).append(label)
    for k, (val, label) in enumerate((v, " / ".join(ls)) for v, ls in merged.items()):
        ax.axhline(val, color="#444444", lw=0.9, ls=(0, (4, 3)), zorder=1)
        ax.annotate(f"{label} {val:g} Å", xy=(1.0, val), xycoords=("axes fraction", "data"),
                    xytext=(-3, 2 + 9 * (k % 2)), textcoords="offset points", ha="right",
                    va="bottom", fontsize=7, color="#333333")


# --------------------------------------------------------------------------------------------- layers

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

    shared/math.md 1.5: reflect q in each edge and take the nearest image; only crossings of x=0 are
    continuous in the signed plane, the other two edges appear once per half.
    """
    (x0, y0), (x1, y1) = p, q
    images = {"x": (-x1, y1), "y": (x1, -y1), "d": (1 - y1, 1 - x1)}
    best = min(images, key=lambda k: math.hypot(images[k][0] - x0, images[k][1] - y0))
    return best != "x"


def _map_frame(ax, labels):
    """The two-sided triangle: halves shaded, boundaries coloured by type, vertices marked."""
    ax.set_aspect("equal")
    ax.grid(False)
    tri_r = np.array([[0, 0], [1, 0], [0, 1]])
    ax.fill(tri_r[:, 0], tri_r[:, 1], color="#eef4fb", zorder=0)
    ax.fill(-tri_r[:, 0], tri_r[:, 1], color="#fbf1ea", zorder=0)
    kw = dict(lw=2.2, solid_capstyle="round", zorder=1)
    ax.plot([-1, 1], [0, 0], color=TYPE_COLOURS["op"], **kw)
    ax.plot([0, 0], [0, 1], color=TYPE_COLOURS["oc"], **kw)
    ax.plot([1, 0, -1], [0, 1, 0], color=TYPE_COLOURS["oc"], **kw)
    ax.plot([0], [0], "s", color=TYPE_COLOURS["tp"], ms=9, zorder=3)
    ax.plot([0], [1], "h", color=TYPE_COLOURS["hp"], ms=11, zorder=3)
    if not labels:
        return
    t = dict(fontsize=8, zorder=4)
    ax.annotate("tp square (0, 0)", (0, 0), xytext=(0, -16), textcoords="offset points",
                ha="center", va="top", color=TYPE_COLOURS["tp"], **t)
    ax.annotate("hp hexagonal (0, 1)", (0, 1), xytext=(0, 9), textcoords="offset points",
                ha="center", va="bottom", color="#333333", **t)
    for sx in (1, -1):
        ax.text(0.55 * sx, -0.025, "op rectangular (y = 0)", ha="center", va="top",
                color=TYPE_COLOURS["op"], **t)
        ax.text(0.52 * sx, 0.52, "oc centred rectangular (x + y = 1)", ha="center",
                va="bottom", rotation=-45 * sx, rotation_mode="anchor", color="#a06800", **t)
    ax.text(0.012, 0.36, "oc centred\nrectangular\n(x = 0)", ha="left", va="center",
            color="#a06800", fontsize=7, zorder=4)
    ax.text(0.62, 0.86, "sign +1", ha="center", fontsize=9, color="#1d4f86")
    ax.text(-0.62, 0.86, "sign −1 (mirror images)", ha="center", fontsize=9, color="#8a4a1d")


def _map_path(ax, h, v, s, xy, steps, big):
    """The path: solid where it is continuous in the signed plane, dotted where it crosses an edge
    that appears once per half (the lattice is the same; the picture jumps to the other half)."""
    from matplotlib.collections import LineCollection
    seg = np.stack([np.stack([h[:-1], v[:-1]], 1), np.stack([h[1:], v[1:]], 1)], 1)
    jump = np.array([s[i] != s[i + 1] and _jump(xy[i], xy[i + 1]) for i in range(len(h) - 1)],
                    bool)
    if (~jump).any():
        ax.add_collection(LineCollection(seg[~jump], colors="#222222", linewidths=1.1, zorder=2))
    if jump.any():
        ax.add_collection(LineCollection(seg[jump], colors="#555555", linewidths=0.8,
                                         linestyles=[(0, (1, 2))], zorder=2))
    sc = ax.scatter(h, v, c=steps, cmap="viridis", s=16 if big else 26, zorder=5,
                    edgecolors="none")
    ax.scatter(h[:1], v[:1], s=90, facecolors="none", edgecolors="#000000", lw=1.4, zorder=6,
               label=f"start (step {steps[0]:g})")
    ax.scatter(h[-1:], v[-1:], s=150, marker="*", color="#D55E00", edgecolors="#000000", lw=0.6,
               zorder=6, label=f"end (step {steps[-1]:g})")
    return sc


def layer_map(frames) -> str:
    """The layer's path on the projected-invariant map, both handedness halves.

    Horizontal: sign × x, vertical: y, with (x, y) the projected invariant (shared/math.md 1.2). The
    right half holds sign +1 lattices, the left half their mirror images (sign -1). Boundaries (sign 0):
    the vertical line x = 0 and the slanted edges are centred rectangular (oc), the bottom edge is
    rectangular (op); square (tp) at (0, 0), hexagonal (hp) at (0, 1).
    """
    xy = np.array([f["projected"] for f in frames], float)
    s = _effective_signs([f.get("sign", 0) for f in frames])
    h, v = s * xy[:, 0], xy[:, 1]
    steps = _steps(frames)
    span = max(np.ptp(h), np.ptp(v))
    flips = np.nonzero(s[1:] != s[:-1])[0]
    still = span < 1e-9  # a fixed cell: one point, nothing to zoom into
    if flips.size:  # zoom on the part of the path from the step before the first change of sign
        k0, equal = int(flips[0]), False
    else:
        k0, equal = 0, True
    zoom = not still and (bool(flips.size) or span < 0.3)
    with _ctx():
        fig = _figure(10.5 if zoom else 7.6, 4.3, left=0.06, right=0.95, bottom=0.11, top=0.93,
                      wspace=0.14)
        if zoom:
            ax, az = fig.subplots(1, 2, gridspec_kw={"width_ratios": [1.75, 1]})
        else:
            ax, az = fig.add_subplot(), None
        _map_frame(ax, labels=True)
        if zoom:
            _map_path(ax, h, v, s, xy, steps, big=True)
        ax.set_xlim(-1.04, 1.04)
        ax.set_ylim(-0.11, 1.1)
        ax.set_xlabel("sign × x   (projected invariant, unitless)")
        ax.set_ylabel("y")
        if az is not None:
            from matplotlib.patches import Rectangle
            hz, vz = h[k0:], v[k0:]
            if equal:
                hx = hy = max(0.66 * span, 0.004)
            else:
                hx = max(0.62 * np.ptp(hz), 1e-4)
                hy = max(0.62 * np.ptp(vz), 1e-4)
            cx, cy = (hz.max() + hz.min()) / 2, (vz.max() + vz.min()) / 2
            ax.add_patch(Rectangle((cx - max(hx, 0.01), cy - max(hy, 0.01)), 2 * max(hx, 0.01),
                                   2 * max(hy, 0.01), fill=False, lw=0.8, ec="#000000", zorder=7))
            _map_frame(az, labels=False)
            sc = _map_path(az, h, v, s, xy, steps, big=False)
            az.set_xlim(cx - hx, cx + hx)
            az.set_ylim(cy - hy, cy + hy)
            if equal:
                az.set_title(f"zoom (box on the left), width {2 * hx:.3g}", loc="left", fontsize=8)
            else:
                az.set_aspect("auto")
                az.set_title(f"zoom from step {steps[k0]:g} (sign changes); not to scale",
                             loc="left", fontsize=8)
                az.axvline(0, color=TYPE_COLOURS["oc"], lw=2.2, zorder=1)
            az.set_xlabel("sign × x")
            az.legend(loc="best", frameon=True, framealpha=0.85, fontsize=7)
            fig.colorbar(sc, ax=az, label="ionic step", shrink=0.85, pad=0.02)
        else:
            sc = _map_path(ax, h, v, s, xy, steps, big=True)
            ax.legend(loc="upper right", frameon=False)
            fig.colorbar(sc, ax=ax, label="ionic step", shrink=0.8, pad=0.01)
    return _svg(fig)


def _series_plot(frames, key, types, ylabel, title, thresholds=(), colours=None):
    steps = _steps(frames)
    with _ctx():
        fig = _figure(7.6, 3.4, left=0.125, right=0.8, bottom=0.14, top=0.91)
        ax = fig.add_subplot()
        for k, t in enumerate(types):
            vals = _floor([f.get(key, {}).get(t) for f in frames])
            c = (colours or {}).get(t, PALETTE[k % len(PALETTE)])
            ls = (0, (4, 2)) if t == "mirror" else "-"
            ax.plot(steps, vals, marker="o" if len(steps) <= 40 else None, ms=2.5,
                    lw=1.0 if t == "mirror" else 1.4, ls=ls, color="#333333" if t == "mirror" else c,
                    label=t)
        _log_axis(ax, ylabel)
        _thresholds(ax, thresholds)
        ax.set_xlabel("ionic step")
        ax.set_title(title, loc="left")
        ax.legend(loc="center left", bbox_to_anchor=(1.0, 0.5), frameon=False,
                  fontsize=8 if len(types) <= 8 else 7, handlelength=1.6, labelspacing=0.3)
    return _svg(fig)


def deformation_plot(frames, types, thresholds=(), title="deformation to each type") -> str:
    """Deformation (Å of lattice-vector change, what flags use) to each type against ionic step."""
    cols = TYPE_COLOURS if "op" in types else None
    return _series_plot(frames, "deformation", types, "deformation (Å)", title, thresholds, cols)


def distance_plot(frames, types, key="distance", title="root-space distance to each type",
                  ylabel="distance (Å, root space)") -> str:
    """Root-space distance (Å) to each type (or lattice-system distance) against ionic step."""
    cols = TYPE_COLOURS if "op" in types else None
    return _series_plot(frames, key, types, ylabel, title, (), cols)


def _edges(s):
    s = np.asarray(s, float)
    if len(s) == 1:
        return np.array([s[0] / 1.5, s[0] * 1.5])
    mid = np.sqrt(s[1:] * s[:-1])
    return np.concatenate([[s[0] ** 2 / mid[0]], mid, [s[-1] ** 2 / mid[-1]]])


def spectrum_plot(frames, common=()) -> str:
    """Tolerance spectrum: symprec (log axis) against step, coloured by spglib's verdict, two panels.

    Left: the structure's group (space group, or layer group for layers); right: the lattice alone
    (Bravais type of a one-atom cell). Breakpoints (the verdict changes between ``low`` and ``high``)
    are marked at their geometric centre.
    """
    rows = [(f.get("step", i), f["symmetry"]) for i, f in enumerate(frames) if f.get("symmetry")]
    steps = np.array([r[0] for r in rows], float)
    gaps = np.diff(np.unique(steps))
    width = 0.8 * (gaps.min() if gaps.size else 1.0)
    from matplotlib.collections import PolyCollection
    with _ctx():
        fig = _figure(7.6, 4.2, left=0.1, right=0.94, bottom=0.25, top=0.92, wspace=0.08)
        axes = fig.subplots(1, 2, sharey=True)
        for ax, what in zip(axes, ("group", "lattice")):
            labels = {}
            for _, spec in rows:
                for i in range(len(spec["symprec"])):
                    lab = _verdict_label(spec, i, what)
                    labels.setdefault(lab, len(labels))
            colour = {lab: ("#dddddd" if lab.startswith("failed") else PALETTE[k % len(PALETTE)])
                      for lab, k in labels.items()}
            rects, cols = [], []
            for st, spec in rows:
                e = _edges(spec["symprec"])
                labs = [_verdict_label(spec, i, what) for i in range(len(spec["symprec"]))]
                i = 0
                while i < len(labs):  # one rectangle per run of equal verdicts
                    j = i
                    while j + 1 < len(labs) and labs[j + 1] == labs[i]:
                        j += 1
                    rects.append([(st - width / 2, e[i]), (st + width / 2, e[i]),
                                  (st + width / 2, e[j + 1]), (st - width / 2, e[j + 1])])
                    cols.append(colour[labs[i]])
                    i = j + 1
                bps = [b for b in spec.get("breakpoints", []) if b.get("kind") == what]
                if bps:
                    y = [math.sqrt(b["low"] * b["high"]) for b in bps if b["low"] and b["high"]]
                    ax.scatter(np.full(len(y), st), y, marker="_", s=max(40, 900 * width /
                                                                           max(np.ptp(steps), 1)),
                               color="#000000", lw=1.6, zorder=4)
            ax.add_collection(PolyCollection(rects, facecolors=cols, edgecolors="none", zorder=2))
            ax.set_xlim(steps.min() - width, steps.max() + width)
            ax.set_ylim(min(r[0][1] for r in rects), max(r[2][1] for r in rects))
            ax.set_yscale("log")
            _plain_log(ax)
            for val in common:
                ax.axhline(val, color="#000000", lw=0.6, ls=(0, (1, 2)), zorder=3)
            ax.set_xlabel("ionic step")
            ax.set_title("structure: space/layer group" if what == "group"
                         else "lattice alone: Bravais type", loc="left")
            handles = [_patch(colour[lab]) for lab in labels]
            ax.legend(handles, [text_safe(x) for x in labels], loc="upper center",
                      bbox_to_anchor=(0.5, -0.14), ncols=min(3, max(1, len(labels))), frameon=False)
            if len(steps) == 1:
                ax.set_xlim(steps[0] - 1, steps[0] + 1)
        axes[0].set_ylabel("symprec (Å)")
        for val in common:
            axes[1].annotate(f"{val:g}", xy=(1.0, val), xycoords=("axes fraction", "data"),
                             xytext=(2, 0), textcoords="offset points", fontsize=7, va="center")
    return _svg(fig)


def _patch(colour):
    from matplotlib.patches import Patch
    return Patch(facecolor=colour, edgecolor="none")


def _verdict_label(spec, i, what):
    if what == "group":
        g = spec["group"][i]
        if not g:
            return "failed (spglib)"
        return f"{spec['group_symbol'][i]} ({g})"
    lat = spec.get("lattice", [None] * len(spec["symprec"]))[i]
    return str(lat) if lat else "failed (spglib)"


def displacement_plot(frames) -> str | None:
    """RMS (solid) and max (dashed) atomic displacement (Å) to each candidate group against step."""
    series = {}
    for i, f in enumerate(frames):
        disp = (f.get("symmetry") or {}).get("displacement") or {}
        for key, d in disp.items():
            if not isinstance(d, dict):
                continue
            lab = f"{d.get('symbol', '?')} ({d.get('group', key)})"
            series.setdefault(lab, []).append((f.get("step", i), d.get("rms"), d.get("max")))
    if not series:
        return None
    with _ctx():
        fig = _figure(7.6, 3.4, left=0.125, right=0.8, bottom=0.14, top=0.91)
        ax = fig.add_subplot()
        for k, (lab, pts) in enumerate(sorted(series.items(), key=lambda kv: _grp(kv[0]))):
            pts.sort(key=lambda p: p[0])
            st = [p[0] for p in pts]
            c = PALETTE[k % len(PALETTE)]
            ax.plot(st, _floor([p[1] for p in pts]), marker="o", ms=3, lw=1.3, color=c,
                    label=text_safe(lab))
            ax.plot(st, _floor([p[2] for p in pts]), lw=0.9, ls="--", color=c)
        _log_axis(ax, "displacement (Å)")
        ax.set_xlabel("ionic step")
        ax.set_title("atomic displacement to each candidate group (solid: RMS, dashed: max)",
                     loc="left")
        ax.legend(loc="center left", bbox_to_anchor=(1.0, 0.5), frameon=False,
                  ncols=1 if len(series) <= 10 else 2)
    return _svg(fig)


def _grp(label):
    m = re.search(r"\((\d+)\)$", label)
    return int(m.group(1)) if m else 0


# ------------------------------------------------------------------------------------------- campaign

def campaign_scatter(points) -> str:
    """Initial against final value for every run, two panels: deformation (Å) and root-space distance
    (Å) to the type the run moved toward. ``points``: ``[(def0, def1, dist0, dist1, verdict, dim)]``.

    Log axes; runs that reached the type (final at or below FLOOR) fall onto the bottom axis.
    """
    with _ctx():
        fig = _figure(10.5, 4.8, left=0.08, right=0.99, bottom=0.11, top=0.93, wspace=0.25)
        axes = fig.subplots(1, 2)
        for ax, (i0, i1), what in zip(axes, ((0, 1), (2, 3)),
                                      ("deformation", "root-space distance")):
            pts = [p for p in points if p[i0] is not None and p[i1] is not None]
            if pts:
                ini = _floor([p[i0] for p in pts])
                fin = _floor([p[i1] for p in pts])
                lo = FLOOR / 1.5
                hi = max(np.nanmax(ini), np.nanmax(fin), 1e-2) * 2
                ax.plot([lo, hi], [lo, hi], color="#888888", lw=0.8, ls="--", zorder=1)
                ax.annotate("no change", (hi / 3, hi / 3), fontsize=7, color="#666666",
                            ha="right", va="bottom")
                for verdict in sorted({p[4] for p in pts}):
                    for dim, marker in ((2, "o"), (3, "s")):
                        m = np.array([p[4] == verdict and p[5] == dim for p in pts])
                        if m.any():
                            ax.scatter(ini[m], fin[m], marker=marker, s=30, alpha=0.85,
                                       color=VERDICT_COLOURS.get(verdict, "#777777"),
                                       edgecolors="#222222", linewidths=0.4, zorder=3,
                                       label=f"{text_safe(verdict)} "
                                             f"({'layer' if dim == 2 else 'bulk'})")
                ax.set_xscale("log")
                ax.set_yscale("log")
                _plain_log(ax, "x")
                _plain_log(ax, "y")
                ax.set_xlim(lo, hi)
                ax.set_ylim(lo, hi)
                ax.set_aspect("equal")
                if what == "deformation":
                    ax.legend(loc="upper left", frameon=False)
            ax.set_xlabel(f"{what} at the first step (Å)")
            ax.set_ylabel(f"{what} at the last step (Å)")
            ax.set_title(f"{what} to the type each run moved toward", loc="left")
    return _svg(fig)


def breakpoint_histogram(group_bps, lattice_bps, common, span) -> str:
    """Distribution of breakpoint positions (geometric centre, Å) across runs: group and lattice kinds;
    ``span`` (low, high) Å is the symprec range the audit mapped."""
    with _ctx():
        fig = _figure(6.2, 3.6, left=0.1, right=0.97, bottom=0.14, top=0.86)
        ax = fig.add_subplot()
        allv = [v for v in list(group_bps) + list(lattice_bps) if v and v > 0]
        lo = min([span[0]] + allv) / 1.2
        hi = max([span[1]] + allv) * 1.2
        bins = np.geomspace(lo, hi, 31)
        ax.hist([list(group_bps), list(lattice_bps)], bins=bins, stacked=True,
                color=[PALETTE[0], PALETTE[1]],
                label=["structure (group changes)", "lattice alone (type changes)"])
        ax.set_xscale("log")
        _plain_log(ax, "x")
        for val in common:
            ax.axvline(val, color="#000000", lw=0.7, ls=(0, (1, 2)))
            ax.annotate(f"{val:g}", xy=(val, 1.0), xycoords=("data", "axes fraction"),
                        xytext=(2, -2), textcoords="offset points", fontsize=7, va="top")
        ax.set_xlabel("symprec where spglib's verdict changes (Å, final frame of each run)")
        ax.set_ylabel("breakpoints")
        ax.yaxis.get_major_locator().set_params(integer=True)
        ax.legend(loc="lower left", bbox_to_anchor=(0.0, 1.04), ncols=2, frameon=False)
    return _svg(fig)


def flag_bars(counts: dict, levels: dict) -> str:
    """Number of runs carrying each flag code (horizontal bars; orange: lattice or structure, blue:
    tolerance or code). ``levels`` maps a code to what it concerns."""
    codes = list(counts)
    with _ctx():
        h = 0.45 * max(len(codes), 2) + 0.9
        fig = _figure(6.2, h, left=0.26, right=0.95, bottom=0.5 / h, top=1 - 0.3 / h)
        ax = fig.add_subplot()
        y = np.arange(len(codes))
        ax.barh(y, [counts[c] for c in codes],
                color=["#E69F00" if levels.get(c) in ("lattice", "structure") else "#56B4E9"
                       for c in codes])
        ax.set_yticks(y, [text_safe(c) for c in codes])
        ax.invert_yaxis()
        ax.set_xlabel("runs with the flag")
        ax.xaxis.get_major_locator().set_params(integer=True)
        ax.set_title("runs per flag (orange: lattice or group, blue: tolerance or code)", loc="left")
        for yy, c in zip(y, codes):
            ax.annotate(str(counts[c]), (counts[c], yy), xytext=(3, 0), textcoords="offset points",
                        va="center", fontsize=8)
    return _svg(fig)
