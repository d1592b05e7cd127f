"""Static HTML reports built from run records only (campaign index plus one page per run).

``build(records, output, *, overwrite=False, campaign=None) -> Path`` writes ``OUTPUT/index.html`` and
``OUTPUT/runs/<name>.html``; see :func:`driftwatch.report.html.build`. matplotlib is imported only when
a report is built.
"""

from .html import build

__all__ = ["build"]
