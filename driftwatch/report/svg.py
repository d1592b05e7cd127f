"""Inline SVG of a :class:`~driftwatch.report.charts.Chart` for the HTML report (no matplotlib).

Small and fast on purpose (a few milliseconds per chart): the browser lays out the text, so widths
are estimated (0.6 em per character) only to reserve margins. Every string is XML-escaped; element
ids carry a prefix unique in the page. Each series is one ``<g class="mark">`` with ``data-key``
(what it is: a type symbol, a group number) and its style, and each legend entry one
``<g class="legend-entry">`` with the same attributes, so tests and scripts can read the picture.
"""

from __future__ import annotations

import math
from html import escape

from .charts import Axis, Chart, Mark, Panel
from .style import VIRIDIS

__all__ = ["render"]

FONT = "DejaVu Sans, Verdana, Arial, sans-serif"
_CH = 0.6          # character width, em
TICK_FS, LABEL_FS, TITLE_FS, LEGEND_FS = 10.5, 11.5, 12.5, 10.5
DASH_SCALE = 1.4   # dash patterns are given in points (as matplotlib); px here


def _x(s) -> str:
    return escape(str(s), quote=True)


def _f(v) -> str:
    """A coordinate in px: one decimal is a tenth of a pixel."""
    return "%.1f" % v


def _tw(text, size) -> float:
    return len(str(text)) * _CH * size


def _points(pts) -> str:
    """``x,y x,y ...`` of (x, y) pairs in px, one decimal (``_f`` each), in one format call."""
    return ("%.1f,%.1f " * len(pts))[:-1] % tuple(v for q in pts for v in q)


def _dash(d) -> str:
    return " ".join(_f(x * DASH_SCALE) for x in d) if d else ""


# -------------------------------------------------------------------------------------------- ticks

def _nice(span, n, integer=False):
    """The 1-2-2.5-5 x 10^k step nearest (in log) to span / n; integers only for step axes."""
    raw = span / max(n, 1)
    if raw <= 0 or not math.isfinite(raw):
        return 1.0
    k = math.floor(math.log10(raw))
    cands = [m * 10.0 ** e for e in (k - 1, k, k + 1) for m in (1, 2, 2.5, 5)]
    if integer:
        cands = [c for c in cands if c >= 1 and abs(c - round(c)) < 1e-9] or [1.0]
    return min(cands, key=lambda c: abs(math.log(c / raw)))


def _decimals(step):
    if step >= 1 and abs(step - round(step)) < 1e-9:
        return 0
    d = max(0, -math.floor(math.log10(step) + 1e-9))
    while d < 12 and abs(step * 10 ** d - round(step * 10 ** d)) > 1e-6:
        d += 1
    return d


def linear_ticks(lo, hi, n=6, integer=False):
    """Tick positions and labels of a linear axis (1-2-2.5-5 steps; integers for step axes)."""
    step = _nice(hi - lo, n, integer)
    first = math.ceil(lo / step - 1e-9)
    ticks = [(first + i) * step for i in range(int((hi - lo) / step + 1e-9) + 2)]
    ticks = [t for t in ticks if lo - 1e-9 * step <= t <= hi + 1e-9 * step]
    d = _decimals(step)
    big = max(abs(lo), abs(hi))
    if big >= 1e5 or (big < 1e-3 and big > 0):
        return ticks, [f"{t:.3g}" for t in ticks]
    return ticks, [f"{t:.{d}f}".replace("-0", "−0").replace("-", "−") if t else "0" for t in ticks]


def log_ticks(lo, hi, max_ticks=8):
    """Decades inside [lo, hi] (every 2nd or 3rd when there are many); 2 and 5 within a decade."""
    a, b = math.ceil(math.log10(lo) - 1e-9), math.floor(math.log10(hi) + 1e-9)
    decs = list(range(a, b + 1))
    every = max(1, math.ceil(len(decs) / max_ticks))
    ticks = [10.0 ** k for k in decs if (k - a) % every == 0]
    if len(decs) < 2:
        ticks = sorted({m * 10.0 ** k for k in range(a - 1, b + 2) for m in (1, 2, 5)
                        if lo <= m * 10.0 ** k <= hi})
    return ticks, [f"{t:g}" for t in ticks]


# ------------------------------------------------------------------------------------------- limits

def _values(marks, axis):
    out = []
    for m in marks:
        if m.kind in ("key", "text") or m.coords == "axes":
            continue
        if m.kind == "hline" and axis == "x" or m.kind == "vline" and axis == "y":
            continue
        vals = list(m.x if axis == "x" else m.y)
        extra = m.x1 if axis == "x" else m.y1
        if extra:
            vals += list(extra)
        out += [float(v) for v in vals if v is not None and math.isfinite(float(v))]
    return out


def limits(axis: Axis, marks, which="y") -> tuple:
    """(lo, hi) of an axis: its ``lim`` or the data's, padded (log: a factor 1.5; linear: 5 %)."""
    if axis.lim is not None:
        return tuple(float(v) for v in axis.lim)
    vals = _values(marks, which)
    if axis.scale == "log":
        pos = [v for v in vals if v > 0] or [1e-3, 1.0]
        return min(pos) / 1.5, max(pos) * 1.5
    if not vals:
        return 0.0, 1.0
    lo, hi = min(vals), max(vals)
    if axis.symmetric:
        top = max(abs(lo), abs(hi)) or 1.0
        lo, hi = -top, top
    span = hi - lo
    need = max(axis.min_span, 1e-12 * max(abs(lo), abs(hi), 1.0))
    if span < need:
        mid = (lo + hi) / 2
        lo, hi = mid - need / 2, mid + need / 2
        span = need
    return lo - 0.05 * span, hi + 0.05 * span


def ticks_of(axis: Axis, lo, hi, length_px, which="x"):
    """(positions, labels) of an axis ``length_px`` long; crowded category labels are thinned
    (x: one per 34 px, y: one per 12 px)."""
    if axis.ticks is not None:
        labels = axis.ticklabels or [f"{t:g}" for t in axis.ticks]
        room = max(2, length_px / (34 if which == "x" else 12))
        if axis.scale == "category" and len(axis.ticks) > room:
            keep = math.ceil(len(axis.ticks) / room)
            labels = [lab if i % keep == 0 else "" for i, lab in enumerate(labels)]
        return list(axis.ticks), list(labels)
    if axis.scale == "log":
        return log_ticks(lo, hi, max_ticks=max(3, int(length_px / 28)))
    return linear_ticks(lo, hi, n=max(2, min(8, int(length_px / 48))), integer=axis.integer)


class _Scale:
    def __init__(self, scale, lo, hi, p0, p1):
        self.log = scale == "log"
        self.lo, self.hi = (math.log10(lo), math.log10(hi)) if self.log else (lo, hi)
        self.p0, self.p1 = p0, p1

    def __call__(self, v):
        if v is None:
            return None
        v = float(v)
        if self.log:
            if v <= 0:
                return None
            v = math.log10(v)
        return self.p0 + (v - self.lo) / ((self.hi - self.lo) or 1.0) * (self.p1 - self.p0)


# ------------------------------------------------------------------------------------------ markers

def marker_path(m, x, y, s) -> str:
    """SVG path data of marker ``m`` (matplotlib's codes) of size ``s`` px centred at (x, y)."""
    r = s / 2
    if m == "o":
        return "M%.1f,%.1fa%.1f,%.1f 0 1,0 %.1f,0a%.1f,%.1f 0 1,0 %.1f,0Z" % (
            x - r, y, r, r, 2 * r, r, r, -2 * r)
    if m in ("x", "+", "_", "|"):
        if m == "x":
            q = r * 0.85
            return f"M{_f(x - q)},{_f(y - q)}L{_f(x + q)},{_f(y + q)}M{_f(x - q)},{_f(y + q)}" \
                   f"L{_f(x + q)},{_f(y - q)}"
        h = f"M{_f(x - r)},{_f(y)}L{_f(x + r)},{_f(y)}"
        v = f"M{_f(x)},{_f(y - r)}L{_f(x)},{_f(y + r)}"
        return {"+": h + v, "_": h, "|": v}[m]
    if m == "s":
        q = r * 0.9
        pts = [(-q, -q), (q, -q), (q, q), (-q, q)]
    elif m == "D":
        pts = [(0, -r), (r * 0.8, 0), (0, r), (-r * 0.8, 0)]
    elif m in ("^", "v"):
        sg = -1 if m == "^" else 1
        pts = [(0, sg * r), (r * 0.95, -sg * r * 0.75), (-r * 0.95, -sg * r * 0.75)]
    elif m in ("h", "p"):
        k = 6 if m == "h" else 5
        pts = [(r * math.sin(2 * math.pi * i / k), -r * math.cos(2 * math.pi * i / k))
               for i in range(k)]
    elif m == "*":
        pts = [((r if i % 2 == 0 else r * 0.42) * math.sin(math.pi * i / 5),
                -(r if i % 2 == 0 else r * 0.42) * math.cos(math.pi * i / 5)) for i in range(10)]
    else:
        return marker_path("o", x, y, s)
    return "M" + "L".join(["%.1f,%.1f" % (x + a, y + b) for a, b in pts]) + "Z"


def _stroked_only(m):
    return m in ("x", "+", "_", "|")


def _marker_attrs(mk: Mark, colour=None):
    c = colour or mk.colour
    if _stroked_only(mk.marker):
        return f'fill="none" stroke="{_x(c)}" stroke-width="{_f(max(mk.width, 1.2))}"'
    if mk.hollow:
        return f'fill="none" stroke="{_x(c)}" stroke-width="1.3"'
    edge = mk.edge or c
    return f'fill="{_x(c)}" stroke="{_x(edge)}" stroke-width="{0.8 if mk.edge else 0.5}"'


# ------------------------------------------------------------------------------------------- render

def _legend_entries(panel: Panel):
    """Legend entries in drawing order, explicit keys (kind 'key') last."""
    out = []
    for m in sorted(panel.marks, key=lambda m: (m.kind == "key", m.z)):
        if not m.label:
            continue
        if m.kind == "rects" and not m.patch:
            out.append(("patch", m))
        elif m.kind == "key" and m.patch:
            out.append(("patch", m))
        elif m.kind in ("points",):
            out.append(("points", m))
        else:
            out.append(("line", m))
    return out


def _swatch(kind, m: Mark, x, y):
    """Legend swatch of a mark with its left edge at x, vertical centre at y."""
    attrs = (f'data-key="{_x(m.key or "")}" data-colour="{_x(m.colour)}" '
             f'data-marker="{_x(m.marker or "")}" data-dash="{_x(_dash(m.dash))}" '
             f'data-hollow="{int(m.hollow)}"')
    parts = [f'<g class="legend-entry" {attrs}>']
    if kind == "patch":
        parts.append(f'<rect x="{_f(x + 5)}" y="{_f(y - 5)}" width="11" height="10" '
                     f'fill="{_x(m.colour)}" stroke="#555" stroke-width="0.4"/>')
    else:
        if kind == "line":
            da = f' stroke-dasharray="{_dash(m.dash)}"' if m.dash else ""
            parts.append(f'<line x1="{_f(x)}" y1="{_f(y)}" x2="{_f(x + 22)}" y2="{_f(y)}" '
                         f'stroke="{_x(m.colour)}" stroke-width="{_f(m.width)}"{da}/>')
        if m.marker:
            parts.append(f'<path d="{marker_path(m.marker, x + 11, y, min(m.size, 11))}" '
                         f'{_marker_attrs(m)}/>')
    parts.append(f'<text x="{_f(x + 27)}" y="{_f(y + 3.6)}" font-size="{LEGEND_FS}">'
                 f'{_x(m.label)}</text></g>')
    return "".join(parts)


def _legend_size(entries, width_avail, where):
    """(width, height, positions [(dx, dy)]) of a legend laid out right (a column) or below (rows)."""
    ws = [30 + _tw(m.label, LEGEND_FS) for _, m in entries]
    if where == "right":
        return (max(ws) if ws else 0), 15 * len(entries), [(0, 15 * i) for i in range(len(entries))]
    pos, x, row = [], 0.0, 0
    for w in ws:
        if x and x + w > width_avail:
            x, row = 0.0, row + 1
        pos.append((x, 15 * row))
        x += w + 8
    return width_avail, (15 * (row + 1) if entries else 0), pos


def _spread(ys, gap=11.0):
    """Push label positions apart (sorted by y) so that neighbours are at least ``gap`` px apart."""
    order = sorted(range(len(ys)), key=lambda i: ys[i])
    out = list(ys)
    for a, b in zip(order, order[1:]):
        if out[b] - out[a] < gap:
            out[b] = out[a] + gap
    return out


class _Ids:
    def __init__(self, prefix):
        self.prefix, self.n = prefix, 0

    def __call__(self):
        self.n += 1
        return f"{self.prefix}-{self.n}"


def render(chart: Chart, prefix: str = "c") -> str:
    """The chart as one ``<svg>`` element (string), ids prefixed with ``prefix``."""
    ids = _Ids(_x(prefix))
    W, H = chart.width, chart.height
    top0 = 24 if chart.title else 4
    out = [f'<svg xmlns="http://www.w3.org/2000/svg" viewBox="0 0 {W} {H}" width="{W}" '
           f'height="{H}" role="img" aria-label="{_x(chart.title or chart.name)}" '
           f'font-family="{FONT}" class="chart" data-chart="{_x(chart.name)}">']
    if chart.title:
        out.append(f'<text x="8" y="16" font-size="{TITLE_FS}" font-weight="bold">'
                   f'{_x(chart.title)}</text>')
    total = sum(p.weight for p in chart.panels)
    x0 = 0.0
    for p in chart.panels:
        w = W * p.weight / total
        out.append(_panel(p, x0, top0, w, H - top0, ids))
        x0 += w
    out.append("</svg>")
    return "".join(out)


def _tick(x, y, dx, dy, grid) -> list[str]:
    """A tick mark from (x, y) to (x + dx, y + dy) and, when ``grid`` is (x1, y1, x2, y2), the grid
    line under it (px)."""
    out = []
    if grid:
        x1, y1, x2, y2 = grid
        out.append(f'<line x1="{_f(x1)}" y1="{_f(y1)}" x2="{_f(x2)}" y2="{_f(y2)}" '
                   f'stroke="#e6e6e6" stroke-width="0.8"/>')
    out.append(f'<line x1="{_f(x + min(dx, 0))}" y1="{_f(y + min(dy, 0))}" x2="{_f(x + max(dx, 0))}" '
               f'y2="{_f(y + max(dy, 0))}" stroke="#333" stroke-width="0.8"/>')
    return out


def _panel(p: Panel, X, Y, W, H, ids) -> str:
    xlo, xhi = limits(p.x, p.marks, "x")
    ylo, yhi = limits(p.y, p.marks, "y")
    # y tick labels decide the left margin: estimate them on a nominal height first
    yt, yl = ticks_of(p.y, ylo, yhi, H * 0.6, "y")
    left = 14 + max([_tw(s, TICK_FS) for s in yl] + [12]) + (18 if p.y.label else 0)
    entries = _legend_entries(p) if p.legend else []
    where = "below" if p.legend == "right" and p.colorbar else p.legend
    notes = [m for m in p.marks if m.kind == "hline" and m.note]
    right = 10 + max([_tw(m.note, 9) + 6 for m in notes] + [0])
    if where == "right" and entries:
        right = max(right, 16 + _legend_size(entries, 0, "right")[0])
    if p.colorbar:
        right = max(right, 64)
    top = 22 if p.title else 8
    if any(m.kind == "vline" and m.note for m in p.marks):
        top += 12
    bottom = 20 + (20 if p.x.label else 0)
    plot_w = max(40.0, W - left - right)
    leg_h = 0.0
    if where == "below" and entries:
        _, leg_h, _ = _legend_size(entries, W - 20, "below")
        leg_h += 8
    plot_h = max(40.0, H - top - bottom - leg_h)
    px0, py0 = X + left, Y + top
    if p.equal:
        sx = plot_w / ((xhi - xlo) or 1)
        sy = plot_h / ((yhi - ylo) or 1)
        s = min(sx, sy)
        nw, nh = (xhi - xlo) * s, (yhi - ylo) * s
        px0 += (plot_w - nw) / 2 if where != "right" else 0
        py0 += (plot_h - nh) / 2
        plot_w, plot_h = nw, nh
    sx = _Scale(p.x.scale, xlo, xhi, px0, px0 + plot_w)
    sy = _Scale(p.y.scale, ylo, yhi, py0 + plot_h, py0)
    out = [f'<g class="panel" data-title="{_x(p.title)}">']
    if p.title:
        out.append(f'<text x="{_f(px0)}" y="{_f(Y + 15)}" font-size="{TITLE_FS - 1}">'
                   f'{_x(p.title)}</text>')
    # grid and ticks
    xt, xl = ticks_of(p.x, xlo, xhi, plot_w, "x")
    yt, yl = ticks_of(p.y, ylo, yhi, plot_h, "y")
    g = []
    for t, lab in zip(xt, xl):
        x = sx(t)
        if x is None or not px0 - 0.5 <= x <= px0 + plot_w + 0.5:
            continue
        g += _tick(x, py0 + plot_h, 0, 4, p.x.grid and (x, py0, x, py0 + plot_h))
        if lab:
            g.append(f'<text x="{_f(x)}" y="{_f(py0 + plot_h + 15)}" font-size="{TICK_FS}" '
                     f'text-anchor="middle">{_x(lab)}</text>')
    for t, lab in zip(yt, yl):
        y = sy(t)
        if y is None or not py0 - 0.5 <= y <= py0 + plot_h + 0.5:
            continue
        g += _tick(px0, y, -4, 0, p.y.grid and (px0, y, px0 + plot_w, y))
        g.append(f'<text x="{_f(px0 - 6)}" y="{_f(y + 3.6)}" font-size="{TICK_FS}" '
                 f'text-anchor="end">{_x(lab)}</text>')
    out.append("".join(g))
    if p.x.label:
        out.append(f'<text x="{_f(px0 + plot_w / 2)}" y="{_f(py0 + plot_h + 33)}" '
                   f'font-size="{LABEL_FS}" text-anchor="middle">{_x(p.x.label)}</text>')
    if p.y.label:
        cx, cy = X + 12, py0 + plot_h / 2
        out.append(f'<text x="{_f(cx)}" y="{_f(cy)}" font-size="{LABEL_FS}" text-anchor="middle" '
                   f'transform="rotate(-90 {_f(cx)} {_f(cy)})">{_x(p.y.label)}</text>')
    clip = ids()
    out.append(f'<clipPath id="{clip}"><rect x="{_f(px0 - 3)}" y="{_f(py0 - 3)}" '
               f'width="{_f(plot_w + 6)}" height="{_f(plot_h + 6)}"/></clipPath>')
    body, after = [], []
    note_items = []
    taken = []     # boxes of point labels already placed
    dots = [(x, y, (m.size or 0) / 2) for m in p.marks if m.kind == "points" and m.size
            for x, y in ((sx(a), sy(b)) for a, b in zip(m.x, m.y))
            if x is not None and y is not None]      # markers: a label avoids covering them
    for m in sorted(p.marks, key=lambda m: m.z):
        if m.kind == "text":
            after.append(_text(m, sx, sy, px0, py0, plot_w, plot_h))
        elif m.kind == "hline":
            y = sy(m.y[0])
            if y is None or not py0 - 0.5 <= y <= py0 + plot_h + 0.5:
                continue
            body.append(_rule(m, px0, y, px0 + plot_w, y))
            if m.note:
                note_items.append((y, m))
        elif m.kind == "vline":
            x = sx(m.x[0])
            if x is None or not px0 - 0.5 <= x <= px0 + plot_w + 0.5:
                continue
            body.append(_rule(m, x, py0, x, py0 + plot_h))
            if m.note:
                after.append(f'<text x="{_f(x)}" y="{_f(py0 - 4)}" font-size="9" '
                             f'text-anchor="middle" fill="{_x(m.colour)}">{_x(m.note)}</text>')
        elif m.kind != "key":
            body.append(_mark(m, sx, sy))
            if m.kind == "points" and m.texts:
                after.append(_point_labels(m, sx, sy, taken, dots,
                                           (px0, py0, px0 + plot_w + right - 4, py0 + plot_h)))
    out.append(f'<g clip-path="url(#{clip})">{"".join(body)}</g>')
    # axes frame (left and bottom)
    if p.frame:
        out.append(f'<path d="M{_f(px0)},{_f(py0)}V{_f(py0 + plot_h)}H{_f(px0 + plot_w)}" '
                   f'fill="none" stroke="#333" stroke-width="1"/>')
    out.append("".join(after))
    if note_items:
        ys = _spread([y for y, _ in note_items])
        for (y0, m), y in zip(note_items, ys):
            out.append(f'<text x="{_f(px0 + plot_w + 4)}" y="{_f(y + 3.2)}" font-size="9" '
                       f'fill="#333">{_x(m.note)}</text>')
    if entries:
        if where == "right":
            lw, lh, pos = _legend_size(entries, 0, "right")
            lx = px0 + plot_w + 14
            ly = py0 + max(8.0, (plot_h - lh) / 2)
        else:
            lw, lh, pos = _legend_size(entries, W - 20, "below")
            lx, ly = X + 10, py0 + plot_h + bottom + 6
        out.append('<g class="legend">' + "".join(
            _swatch(kind, m, lx + dx, ly + dy) for (kind, m), (dx, dy) in zip(entries, pos))
            + "</g>")
    if p.colorbar:
        out.append(_colorbar(p.colorbar, px0 + plot_w + 12, py0 + plot_h * 0.08, plot_h * 0.84,
                             ids))
    out.append("</g>")
    return "".join(out)


def _rule(m, x1, y1, x2, y2):
    da = f' stroke-dasharray="{_dash(m.dash)}"' if m.dash else ""
    return (f'<line x1="{_f(x1)}" y1="{_f(y1)}" x2="{_f(x2)}" y2="{_f(y2)}" '
            f'stroke="{_x(m.colour)}" stroke-width="{_f(m.width)}"{da}/>')


def _mark(m: Mark, sx, sy) -> str:
    attrs = (f'class="mark" data-kind="{m.kind}" data-key="{_x(m.key or "")}" '
             f'data-colour="{_x(m.colour)}" data-marker="{_x(m.marker or "")}" '
             f'data-dash="{_x(_dash(m.dash))}" data-hollow="{int(m.hollow)}"'
             + (f' data-label="{_x(m.label)}"' if m.label else ""))
    parts = [f"<g {attrs}>"]
    if m.kind == "line":
        pts = [(sx(a), sy(b)) for a, b in zip(m.x, m.y)]
        runs, cur = [], []
        for q in pts:
            if q[0] is None or q[1] is None:
                if cur:
                    runs.append(cur)
                cur = []
            else:
                cur.append(q)
        if cur:
            runs.append(cur)
        da = f' stroke-dasharray="{_dash(m.dash)}"' if m.dash else ""
        for r in runs:
            if len(r) > 1:
                parts.append(f'<polyline points="{_points(r)}" '
                             f'fill="none" stroke="{_x(m.colour)}" stroke-width="{_f(m.width)}" '
                             f'stroke-linejoin="round"{da}/>')
        if m.marker:
            start, stride = m.every or (0, 1)
            d = "".join(marker_path(m.marker, a, b, m.size)
                        for i, (a, b) in enumerate(pts)
                        if a is not None and b is not None and i >= start
                        and (i - start) % stride == 0)
            if d:
                parts.append(f'<path d="{d}" {_marker_attrs(m)}/>')
    elif m.kind == "points":
        for i, (a, b) in enumerate(zip(m.x, m.y)):
            x, y = sx(a), sy(b)
            if x is None or y is None:
                continue
            col = (m.colours[i] if m.colours else m.colour)
            el = f'<path d="{marker_path(m.marker or "o", x, y, m.size)}" {_marker_attrs(m, col)}>'
            el += (f"<title>{_x(m.tips[i])}</title>" if m.tips else "") + "</path>"
            if m.links and m.links[i]:
                el = f'<a href="{_x(m.links[i])}">{el}</a>'
            parts.append(el)
    elif m.kind == "rects":
        for i in range(len(m.x)):
            xa, xb, ya, yb = sx(m.x[i]), sx(m.x1[i]), sy(m.y[i]), sy(m.y1[i])
            if None in (xa, xb, ya, yb) or m.y1[i] == m.y[i]:
                continue
            x, w = min(xa, xb), abs(xb - xa)
            y, h = min(ya, yb), abs(yb - ya)
            col = m.colours[i] if m.colours else m.colour
            edge = f' stroke="{_x(m.edge)}" stroke-width="0.6"' if m.edge else ""
            tip = f"<title>{_x(m.tips[i])}</title>" if m.tips else ""
            parts.append(f'<rect x="{_f(x)}" y="{_f(y)}" width="{_f(w)}" height="{_f(h)}" '
                         f'fill="{_x(col)}"{edge}>{tip}</rect>')
            if m.texts and m.texts[i]:
                t = m.texts[i]
                if m.outside:      # a count after a horizontal bar
                    parts.append(f'<text x="{_f(x + w + 4)}" y="{_f(y + h / 2 + 3.4)}" '
                                 f'font-size="9.5">{_x(t)}</text>')
                elif h >= 12 and w >= _tw(t, 9) + 2:
                    parts.append(f'<text x="{_f(x + w / 2)}" y="{_f(y + h / 2 + 3.2)}" '
                                 f'font-size="9" text-anchor="middle" fill="{_ink(col)}">'
                                 f"{_x(t)}</text>")
    elif m.kind == "poly":
        pts = [(sx(a), sy(b)) for a, b in zip(m.x, m.y)]
        if all(a is not None and b is not None for a, b in pts):
            fill = _x(m.fill) if m.fill else "none"
            stroke = (f' stroke="{_x(m.edge)}" stroke-width="{_f(m.width)}"' if m.edge else "")
            parts.append(f'<polygon points="{_points(pts)}" '
                         f'fill="{fill}"{stroke}/>')
    parts.append("</g>")
    return "".join(parts)


def _point_labels(m: Mark, sx, sy, taken, dots, bounds) -> str:
    """Labels beside points (right, left, above, below: the first place inside ``bounds`` free of
    earlier labels and of other points' markers ``dots`` [(x, y, half size) px], else the first
    free of labels alone); a label with no place free of labels is left out (its point keeps its
    tooltip)."""
    out = []
    x0b, y0b, x1b, y1b = bounds
    hit = lambda box, q: box[0] < q[2] and q[0] < box[2] and box[1] < q[3] and q[1] < box[3]
    for i, (a, b) in enumerate(zip(m.x, m.y)):
        x, y = sx(a), sy(b)
        if x is None or y is None or not m.texts[i]:
            continue
        t = str(m.texts[i])
        w = _tw(t, 9)
        r = m.size / 2 + 2
        others = [(u - h, v - h, u + h, v + h) for u, v, h in dots
                  if abs(u - x) > 0.5 or abs(v - y) > 0.5]      # its own stack of rings aside
        places = []
        for dx, dy, anchor in ((r, 3.2, "start"), (-r, 3.2, "end"), (0, -r - 1, "middle"),
                               (0, r + 8, "middle")):
            left = x + dx - (w if anchor == "end" else w / 2 if anchor == "middle" else 0)
            box = (left, y + dy - 8, left + w, y + dy + 2)
            if box[0] < x0b or box[2] > x1b or box[1] < y0b or box[3] > y1b:
                continue
            if not any(hit(box, q) for q in taken):
                places.append((any(hit(box, q) for q in others), dx, dy, anchor, box))
        if not places:
            continue
        _, dx, dy, anchor, box = min(places, key=lambda c: c[0])     # stable: first free place
        taken.append(box)
        el = (f'<text x="{_f(x + dx)}" y="{_f(y + dy)}" font-size="9" fill="#333" '
              f'text-anchor="{anchor}">{_x(t)}</text>')
        if m.links and m.links[i]:
            el = f'<a href="{_x(m.links[i])}">{el}</a>'
        out.append(el)
    return "".join(out)


def _ink(colour):
    """Black or white text on a fill colour (WCAG relative luminance, threshold 0.4)."""
    try:
        r, g, b = (int(colour[k:k + 2], 16) / 255 for k in (1, 3, 5))
    except (ValueError, IndexError):
        return "#000"
    lum = 0.2126 * r ** 2.2 + 0.7152 * g ** 2.2 + 0.0722 * b ** 2.2
    return "#000" if lum > 0.3 else "#fff"


def _text(m: Mark, sx, sy, px0, py0, pw, ph) -> str:
    if m.coords == "axes":
        x, y = px0 + m.x[0] * pw, py0 + (1 - m.y[0]) * ph
    else:
        x, y = sx(m.x[0]), sy(m.y[0])
        if x is None or y is None:
            return ""
    x, y = x + m.offset[0], y - m.offset[1]
    lines = [str(t) for t in (m.texts or [])]
    n = len(lines)
    lh = m.fontsize * 1.15
    shift = {"baseline": 0.0, "center": 0.35 * m.fontsize - (n - 1) * lh / 2,
             "top": 0.8 * m.fontsize, "bottom": -(n - 1) * lh - 0.2 * m.fontsize}[m.valign]
    anchor = {"start": "start", "middle": "middle", "end": "end"}[m.anchor]
    rot = f' transform="rotate({_f(-m.rotation)} {_f(x)} {_f(y)})"' if m.rotation else ""
    spans = "".join(f'<tspan x="{_f(x)}" dy="{_f(shift if i == 0 else lh)}">{_x(t)}</tspan>'
                    for i, t in enumerate(lines))
    return (f'<text x="{_f(x)}" y="{_f(y)}" font-size="{_f(m.fontsize)}" text-anchor="{anchor}" '
            f'fill="{_x(m.colour)}"{rot}>{spans}</text>')


def _colorbar(cb, x, y, h, ids) -> str:
    gid = ids()
    stops = "".join(f'<stop offset="{i / (len(VIRIDIS) - 1):.4f}" stop-color="{c}"/>'
                    for i, c in enumerate(VIRIDIS))
    lo, hi = float(cb["lo"]), float(cb["hi"])
    ticks, labels = linear_ticks(lo, hi, n=5, integer=True)
    t = []
    for v, lab in zip(ticks, labels):
        yy = y + h - (v - lo) / ((hi - lo) or 1) * h
        t.append(f'<line x1="{_f(x + 12)}" y1="{_f(yy)}" x2="{_f(x + 15)}" y2="{_f(yy)}" '
                 f'stroke="#333" stroke-width="0.8"/><text x="{_f(x + 17)}" y="{_f(yy + 3.4)}" '
                 f'font-size="9.5">{_x(lab)}</text>')
    cx, cy = x + 46, y + h / 2
    return (f'<g class="colorbar"><linearGradient id="{gid}" x1="0" y1="1" x2="0" y2="0">{stops}'
            f'</linearGradient><rect x="{_f(x)}" y="{_f(y)}" width="12" height="{_f(h)}" '
            f'fill="url(#{gid})" stroke="#555" stroke-width="0.5"/>{"".join(t)}'
            f'<text x="{_f(cx)}" y="{_f(cy)}" font-size="10" text-anchor="middle" '
            f'transform="rotate(-90 {_f(cx)} {_f(cy)})">{_x(cb.get("label", ""))}</text></g>')
