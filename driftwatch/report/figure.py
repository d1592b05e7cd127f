"""matplotlib ``Figure`` of a :class:`~driftwatch.report.charts.Chart` (for notebooks and scripts).

Draws the same marks, styles, limits and ticks as the report's SVG (:mod:`driftwatch.report.svg`
computes the limits and ticks for both). No pyplot: the Figure is not registered with a GUI, a
notebook shows it as the cell's value, ``fig.savefig(...)`` writes it. Mathtext and TeX are off for
every text element, so a ``$`` that came from an input file is drawn as a dollar sign. Each series'
artist carries its ``key`` as ``gid`` (``artist.get_gid()``).
"""

from __future__ import annotations

import math

from .charts import Chart, Mark, Panel
from . import svg as _svg

__all__ = ["to_figure", "RC"]

RC = {"text.parse_math": False, "text.usetex": False, "svg.fonttype": "none",
      "svg.hashsalt": "driftwatch", "font.family": "sans-serif", "font.sans-serif": ["DejaVu Sans"],
      "font.size": 9, "axes.titlesize": 9.5, "axes.labelsize": 9, "legend.fontsize": 8,
      "xtick.labelsize": 8, "ytick.labelsize": 8, "axes.spines.top": False,
      "axes.spines.right": False, "figure.dpi": 100}
"""matplotlib settings of every figure (input text is drawn as is; same bytes for the same input)."""

_PX = 0.75   # svg px -> points (marker sizes, line widths are given in px)


def _figure_class():
    from matplotlib.figure import Figure

    class ChartFigure(Figure):
        """A Figure whose ``savefig`` keeps every legend and note written outside the axes
        (``bbox_inches="tight"`` unless given), as a notebook shows it."""

        def savefig(self, fname, *args, **kwargs):
            kwargs.setdefault("bbox_inches", "tight")
            return super().savefig(fname, *args, **kwargs)
    return ChartFigure


def to_figure(chart: Chart):
    """A matplotlib Figure drawing ``chart``."""
    import matplotlib
    with matplotlib.rc_context(RC):
        fig = _figure_class()(figsize=(chart.width / 100, chart.height / 100),
                              layout="constrained")
        gs = fig.add_gridspec(1, len(chart.panels), width_ratios=[p.weight for p in chart.panels])
        total = sum(p.weight for p in chart.panels)
        for p, spec in zip(chart.panels, gs):
            ax = fig.add_subplot(spec)
            _panel(fig, ax, p, chart.width * p.weight / total, chart.height)
        if chart.title:
            fig.suptitle(chart.title, x=0.01, ha="left", fontsize=10, fontweight="bold")
    return fig


def _nan(values):
    return [math.nan if v is None else float(v) for v in values]


def _ls(dash):
    return (0, tuple(d * _svg.DASH_SCALE * _PX for d in dash)) if dash else "-"


def _panel(fig, ax, p: Panel, width_px, height_px):
    from matplotlib.lines import Line2D
    from matplotlib.patches import Patch
    from matplotlib.ticker import NullLocator
    lims = {}
    for axis, which in ((p.x, "x"), (p.y, "y")):
        lims[which] = _svg.limits(axis, p.marks, which)
        if axis.scale == "log":
            (ax.set_xscale if which == "x" else ax.set_yscale)("log")
        (ax.set_xlim if which == "x" else ax.set_ylim)(*lims[which])
    handles = []
    for m in sorted(p.marks, key=lambda m: (m.kind == "key", m.z)):
        h = _draw(ax, m)
        if m.label and h is not None:
            handles.append((h, m.label))
        elif m.label and m.kind == "key":
            if m.patch:
                handles.append((Patch(facecolor=m.colour, edgecolor="#555555", lw=0.4), m.label))
            else:
                handles.append((Line2D([], [], color=m.colour, marker=m.marker or "",
                                       ls=_ls(m.dash), mfc="none" if m.hollow else m.colour,
                                       gid="key"), m.label))
    for axis, which, length in ((p.x, "x", width_px * 0.7), (p.y, "y", height_px * 0.6)):
        lo, hi = lims[which]
        a = ax.xaxis if which == "x" else ax.yaxis
        (ax.set_xlim if which == "x" else ax.set_ylim)(lo, hi)
        ticks, labels = _svg.ticks_of(axis, lo, hi, length)
        a.set_ticks(ticks, labels=labels)
        a.set_minor_locator(NullLocator())
        (ax.set_xlabel if which == "x" else ax.set_ylabel)(axis.label)
        if axis.grid:
            ax.grid(True, axis=which, color="#e6e6e6", lw=0.8)
        else:
            ax.grid(False, axis=which)
    ax.set_axisbelow(True)
    if p.equal:
        ax.set_aspect("equal")
    if p.title:
        ax.set_title(p.title, loc="left")
    if p.legend and handles:
        hs, ls = zip(*handles)
        if p.legend == "right":
            ax.legend(hs, ls, loc="center left", bbox_to_anchor=(1.02, 0.5), frameon=False)
        else:
            ax.legend(hs, ls, loc="upper left", bbox_to_anchor=(0.0, -0.16), frameon=False,
                      ncols=max(1, min(len(hs), int(width_px // 170))))
    if p.colorbar:
        import matplotlib as mpl
        sm = mpl.cm.ScalarMappable(norm=mpl.colors.Normalize(p.colorbar["lo"], p.colorbar["hi"]),
                                   cmap="viridis")
        fig.colorbar(sm, ax=ax, label=p.colorbar.get("label", ""), shrink=0.85, pad=0.02)


def _draw(ax, m: Mark):
    """Draw one mark; returns the legend handle (or None)."""
    z = m.z
    if m.kind == "line":
        mfc = "none" if m.hollow else m.colour
        every = None if not m.every else (int(m.every[0]), int(m.every[1]))
        (line,) = ax.plot(_nan(m.x), _nan(m.y), color=m.colour, ls=_ls(m.dash),
                          lw=m.width * _PX * 1.2, marker=m.marker or "", ms=m.size * _PX * 1.2,
                          mfc=mfc, mec=m.colour, markevery=every, zorder=z, gid=m.key)
        return line
    if m.kind == "points":
        cols = m.colours or [m.colour] * len(m.x)
        kw = dict(s=(m.size * _PX * 1.2) ** 2, marker=m.marker or "o", zorder=z, gid=m.key)
        if m.marker in ("x", "+", "_", "|"):
            sc = ax.scatter(_nan(m.x), _nan(m.y), c=cols, linewidths=max(m.width, 1.2) * _PX, **kw)
        elif m.hollow:
            sc = ax.scatter(_nan(m.x), _nan(m.y), facecolors="none", edgecolors=cols,
                            linewidths=1.3 * _PX, **kw)
        else:
            sc = ax.scatter(_nan(m.x), _nan(m.y), c=cols, edgecolors=m.edge or "face",
                            linewidths=0.8 * _PX, **kw)
        if m.links:
            sc.set_urls(list(m.links))
        for i, t in enumerate(m.texts or []):
            ax.annotate(t, (m.x[i], m.y[i]), xytext=(m.offset[0] * _PX, m.offset[1] * _PX),
                        textcoords="offset points", fontsize=7, color="#333333")
        return sc
    if m.kind == "rects":
        from matplotlib.collections import PolyCollection
        polys, cols = [], []
        for i in range(len(m.x)):
            if m.y1[i] == m.y[i]:
                continue
            x0, x1, y0, y1 = m.x[i], m.x1[i], m.y[i], m.y1[i]
            polys.append([(x0, y0), (x1, y0), (x1, y1), (x0, y1)])
            cols.append(m.colours[i] if m.colours else m.colour)
        pc = PolyCollection(polys, facecolors=cols, edgecolors=m.edge or "none", linewidths=0.6,
                            zorder=z, gid=m.key)
        ax.add_collection(pc)
        ylog = ax.get_yscale() == "log"
        for i, t in enumerate(m.texts or []):
            if not t or m.y1[i] == m.y[i]:
                continue
            if m.outside:
                ax.annotate(t, (m.x1[i], (m.y[i] + m.y1[i]) / 2), xytext=(3, 0),
                            textcoords="offset points", va="center", fontsize=7.5)
            elif (m.y[i] > 0 and m.y1[i] / m.y[i] > 3) if ylog else \
                    abs(m.y1[i] - m.y[i]) > 0.05 * abs(ax.get_ylim()[1] - ax.get_ylim()[0]):
                ax.text((m.x[i] + m.x1[i]) / 2, math.sqrt(m.y[i] * m.y1[i]) if ylog else
                        (m.y[i] + m.y1[i]) / 2, t, ha="center",
                        va="center", fontsize=7, color=_svg._ink(cols[min(i, len(cols) - 1)]),
                        zorder=z + 1)
        if m.label:
            from matplotlib.patches import Patch
            return Patch(facecolor=m.colour, edgecolor="none")
        return None
    if m.kind == "poly":
        if m.fill:
            ax.fill(m.x, m.y, color=m.fill, zorder=z, lw=0)
        if m.edge:
            xs, ys = list(m.x) + [m.x[0]], list(m.y) + [m.y[0]]
            ax.plot(xs, ys, color=m.edge, lw=m.width * _PX, zorder=z)
        return None
    if m.kind in ("hline", "vline"):
        f = ax.axhline if m.kind == "hline" else ax.axvline
        f(m.y[0] if m.kind == "hline" else m.x[0], color=m.colour, ls=_ls(m.dash),
          lw=m.width * _PX * 1.2, zorder=z)
        if m.note:
            if m.kind == "hline":
                ax.annotate(m.note, xy=(1.0, m.y[0]), xycoords=("axes fraction", "data"),
                            xytext=(3, 0), textcoords="offset points", va="center", fontsize=7,
                            color="#333333", annotation_clip=False)
            else:
                ax.annotate(m.note, xy=(m.x[0], 1.0), xycoords=("data", "axes fraction"),
                            xytext=(0, 3), textcoords="offset points", ha="center", fontsize=7,
                            color=m.colour, annotation_clip=False)
        return None
    if m.kind == "text":
        va = {"baseline": "baseline", "center": "center", "top": "top", "bottom": "bottom"}[m.valign]
        ha = {"start": "left", "middle": "center", "end": "right"}[m.anchor]
        xy = (m.x[0], m.y[0])
        ax.annotate("\n".join(str(t) for t in m.texts or []), xy,
                    xycoords="axes fraction" if m.coords == "axes" else "data",
                    xytext=(m.offset[0] * _PX, m.offset[1] * _PX), textcoords="offset points",
                    ha=ha, va=va, rotation=m.rotation, rotation_mode="anchor",
                    fontsize=m.fontsize * _PX, color=m.colour, zorder=z)
        return None
    return None
