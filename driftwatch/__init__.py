"""driftwatch: continuous symmetry-drift monitoring for relaxations of layers and bulk crystals.

Public interface (stable):

- :mod:`driftwatch.lattice2d` -- root invariant, sign, projected invariant, distances of 2D lattices.
- :mod:`driftwatch.lattice3d` -- root products and distances to the 13 non-triclinic Bravais types.
- :func:`read_run` -- read a relaxation (file or run folder) into a :class:`~driftwatch.adapters.Run`.
- :func:`analyze` -- the run record (what ``driftwatch inspect PATH --json`` prints).
- :mod:`driftwatch.plots` -- matplotlib Figures of a record (what the HTML report draws).
- :mod:`driftwatch.tables` -- records as pandas DataFrames (per frame, per run).

Heavy modules (ASE readers, spglib) load on first use, so ``import driftwatch`` stays light.
"""

__version__ = "0.1.15"
__all__ = ["lattice2d", "lattice3d", "plots", "tables", "read_run", "analyze", "__version__"]


def __getattr__(name):
    import importlib
    if name in ("lattice2d", "lattice3d", "plots", "tables"):
        return importlib.import_module(f"driftwatch.{name}")
    if name == "read_run":
        from .adapters import read_run
        return read_run
    if name == "analyze":
        from .track import analyze
        return analyze
    raise AttributeError(f"module 'driftwatch' has no attribute {name!r}")


def __dir__():
    return sorted(set(globals()) | set(__all__))
