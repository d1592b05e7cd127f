"""Error types. Every error driftwatch raises on purpose is a DriftwatchError.

Each subclass also inherits the builtin it specialises, so callers can catch
either (``except ValueError`` keeps working). Messages are one line and name
the file and the problem.
"""

__all__ = [
    "DriftwatchError", "LatticeError", "InputError", "UnknownFormatError", "AtomsChangeError",
    "NotARunError", "GeometryError", "NotPeriodicError", "ConfigError", "SymmetryError", "OutputError",
    "NotAnalysed", "NoIonicStepError", "ForeignOutputError",
]


class DriftwatchError(Exception):
    """Base class of every error driftwatch raises on purpose."""


class LatticeError(DriftwatchError, ValueError):
    """A basis is not a lattice: zero, collinear/coplanar, singular or non-finite vectors."""


class InputError(DriftwatchError, ValueError):
    """A file or run folder cannot be read as a relaxation. ``path`` names it."""

    def __init__(self, path, problem):
        self.path = str(path)
        self.problem = str(problem)
        super().__init__(f"{self.path}: {self.problem}")


class UnknownFormatError(InputError):
    """No registered adapter recognises the file."""


class NotAnalysed:
    """Mixin of the errors for a run driftwatch does not analyse by its nature (not a failure): an
    audit lists it as skipped with ``reason`` and ``include``, what would give a run."""
    reason: str
    include: str


class _SkippedInput(InputError, NotAnalysed):
    def __init__(self, path, reason: str, include: str):
        super().__init__(path, f"{reason}; to include it: {include}")
        self.reason, self.include = reason, include


class ForeignOutputError(_SkippedInput, UnknownFormatError):
    """The output of a code driftwatch has no reader for (its banner says which)."""


class AtomsChangeError(InputError):
    """The frames read as one run hold other atoms (count or elements) from one step on."""


class DamagedFrameError(InputError):
    """A frame holds numbers no structure has (not finite, or absurdly far away): a run that blew
    up, or a damaged file. After good frames the run ends there (:func:`adapters.run.checked`)."""


class NotARunError(InputError):
    """The path is no run and will not become one while a job writes (the parent folder of a
    nudged-elastic-band calculation, a file of many structures read whole, a job's ``inputs/``
    beside its ``outputs/``): following it stops at once instead of waiting."""


class GeometryError(DriftwatchError, ValueError):
    """The cell is not what the analysis needs (e.g. 1D/0D, or no layer when one is required)."""


class NotPeriodicError(GeometryError, NotAnalysed):
    """A molecule, cluster or wire (in a box, or by its pbc): neither a layer nor bulk, so not
    analysed (an audit lists it as skipped: ``reason``, and ``include``, the setting or change
    that would include it)."""

    def __init__(self, reason: str, include: str, source=None):
        super().__init__(("" if source is None else f"{source}: ") + f"{reason}: driftwatch "
                         f"analyses layers and bulk crystals; to include it: {include}")
        self.reason, self.include = reason, include
        self.path = None if source is None else str(source)


class NoIonicStepError(_SkippedInput):
    """A complete output with no ionic step by its nature (pw.x's non-self-consistent runs)."""


class ConfigError(DriftwatchError, ValueError):
    """A configuration file or value is invalid. The message names the key."""


class SymmetryError(DriftwatchError, RuntimeError):
    """spglib could not analyse a structure (it returned None or raised)."""


class OutputError(DriftwatchError, OSError):
    """An output cannot be written safely (locked database, path outside the output folder, ...)."""
