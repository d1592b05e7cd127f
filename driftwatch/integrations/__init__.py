"""Integrations with the workflow tools users already run; each is an optional extra.

* :mod:`driftwatch.integrations.custodian` -- ``SymmetryValidator`` (fails a job whose structure
  collapsed) and ``SymmetryStopHandler`` (a monitor that requests the code's soft stop).
  Needs ``custodian`` (``pip install driftwatch[custodian]``).
* :mod:`driftwatch.integrations.jobflow` -- ``SymmetryCheckMaker`` / ``check_relaxation``: a job that
  checks a relaxation's output and can stop the children of the flow. Needs ``jobflow``.

Importing this package imports neither library; each submodule imports its own.
"""

__all__ = ["custodian", "jobflow"]
