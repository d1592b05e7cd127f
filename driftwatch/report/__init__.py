"""Static HTML reports built from run records only (campaign index plus one page per run).

``build(records, output, *, overwrite=False, campaign=None, workers=None, progress="auto") -> Path``
writes ``OUTPUT/index.html`` and ``OUTPUT/runs/<name>.html``; see :func:`driftwatch.report.html.build`.
What each plot shows is described once (:mod:`driftwatch.report.charts`) and drawn as inline SVG for
the report (:mod:`driftwatch.report.svg`) or as a matplotlib Figure for notebooks
(:mod:`driftwatch.report.figure`, behind :mod:`driftwatch.plots`). Fixed colours, markers and dash
patterns per Bravais type and group number: :mod:`driftwatch.report.style`.
"""

from .html import build

__all__ = ["build"]
