"""The report's plots as matplotlib Figures, for notebooks and scripts.

Every function takes a run record (a dict, or the path of a record JSON file) and returns a
``matplotlib.figure.Figure`` (no pyplot: a notebook shows it as a cell's value; ``fig.savefig(...)``
writes it), or None when the plot does not apply (a layer map of a bulk run, a spectrum of a run spglib
never saw). They draw the same charts as the HTML report (:mod:`driftwatch.report.charts`) with the same
fixed colours, markers and dash patterns per Bravais type and group number
(:mod:`driftwatch.report.style`)::

    import driftwatch.plots
    fig = driftwatch.plots.deformation("audit/records/camp_L03.json")
    figs = driftwatch.plots.figures(record)          # every plot of the run's page, by name

Lengths Å, energies eV, forces eV/Å; values at or below 1e-6 Å are drawn on the bottom axis of log
plots. matplotlib is imported when a figure is made.
"""

from __future__ import annotations

__all__ = ["layer_map", "chirality", "deformation", "distance", "cell", "energy", "spectrum",
           "displacement", "figures", "campaign"]


def _record(record):
    if isinstance(record, dict):
        return record
    from .records import read_json
    return read_json(record)


def _fig(chart):
    if chart is None:
        return None
    from .report.figure import to_figure
    return to_figure(chart)


def layer_map(record):
    """Layers: the path on the two-sided projected-invariant map (start circled, end starred)."""
    from .report import charts
    return _fig(charts.layer_map(_record(record)))


def chirality(record):
    """Layers: signed chiral distance and sign × deformation to the nearest mirror lattice (Å)."""
    from .report import charts
    return _fig(charts.chirality(_record(record)))


def deformation(record):
    """Deformation (Å; what the flags use) to each Bravais type, with the flag thresholds."""
    from .report import charts
    return _fig(charts.deformation(_record(record)))


def distance(record):
    """Root-space distance (Å) to each 2D type (layers) or to each lattice system (bulk)."""
    from .report import charts
    return _fig(charts.distance(_record(record)))


def cell(record):
    """Selling-reduced cell parameters per step (:func:`driftwatch.tables.cell_parameters`)."""
    from .report import charts
    return _fig(charts.cell(_record(record)))


def energy(record):
    """Energy relative to the last step (eV) and the largest force on an atom (eV/Å)."""
    from .report import charts
    return _fig(charts.energy(_record(record)))


def spectrum(record):
    """spglib's verdict across symprec for the frames it was asked about (group; lattice alone)."""
    from .report import charts
    rec = _record(record)
    return _fig(charts.spectrum(rec, charts.common_symprecs(rec)))


def displacement(record):
    """RMS and max atomic displacement (Å) to each group spglib found."""
    from .report import charts
    return _fig(charts.displacement(_record(record)))


def figures(record) -> dict:
    """Every plot of the run's report page that applies, by name (layer_map, chirality, deformation,
    distance, cell, energy, spectrum, displacement)."""
    from .report import charts
    rec = _record(record)
    return {name: _fig(c) for name, c in charts.run_charts(rec, charts.common_symprecs(rec)).items()
            if c is not None}


def campaign(records):
    """Initial against final deformation and root-space distance to the type of each run's verdict
    (the campaign index's scatter). ``records``: record dicts or files, folders of records or an
    audit's output folder; points are named by run (and link to ``runs/<name>.html`` in SVG)."""
    from .records import safe_name
    from .report import charts
    from .tables import _iter_records
    pts = charts.scatter_points((name, f"runs/{safe_name(name)}.html", rec)
                                for name, rec in _iter_records(records))
    return _fig(charts.campaign_scatter(pts))
