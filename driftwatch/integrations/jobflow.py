"""jobflow integration: a job that checks a relaxation's output and can stop the flow's children.

::

    from jobflow import Flow, run_locally
    from driftwatch.integrations.jobflow import SymmetryCheckMaker

    check = SymmetryCheckMaker(reject_on=["lattice-gained"]).make(relax.output)  # a run folder,
    flow = Flow([relax, check, downstream])                   # a task document, or structures
    run_locally(flow)

The check's output is ``{"passed", "verdict", "flags", "rejected_by", "summary", "source", "error",
"record"}`` (``verdict``: gained, lost, changed or kept); when it did not pass (and ``stop_children_on_fail``), it returns
``Response(stop_children=True)`` so the jobs that depend on it do not run. To report on relaxations
that failed, set ``check.config.on_missing_references = OnMissing.NONE``: the check then receives
None and fails with ``error`` saying so. A pass only means none of the chosen diagnostics was
raised.
"""

from __future__ import annotations

import json
from dataclasses import dataclass, field

from jobflow import Maker, Response, job

from .. import records, rules
from ..errors import DriftwatchError
from ..live import _codes

__all__ = ["SymmetryCheckMaker", "check_relaxation", "run_from_structures"]


def run_from_structures(structures, source="<structures>"):
    """A :class:`~driftwatch.adapters.Run` from pymatgen Structures (or their dicts) or ASE Atoms."""
    import numpy as np

    from ..adapters.run import Frame, ReadContext, collect
    frames = []
    for i, s in enumerate(structures):
        if isinstance(s, dict):
            from pymatgen.core import Structure
            s = Structure.from_dict(s)
        if hasattr(s, "lattice"):           # pymatgen Structure
            pbc = np.array(getattr(s.lattice, "pbc", (True, True, True)), bool)
            frames.append(Frame(cell=np.array(s.lattice.matrix, float),
                                positions=np.array(s.cart_coords, float),
                                numbers=np.array(s.atomic_numbers, int), pbc=pbc, step=i))
        else:                               # ase.Atoms
            from ..adapters.run import frame_from_atoms
            frames.append(frame_from_atoms(s, i))
    ctx = ReadContext(source)
    return collect(frames, path=source, fmt="structures", ctx=ctx)


def _path_of(run):
    if isinstance(run, dict):
        for key in ("dir_name", "run_dir", "directory", "path"):
            if run.get(key):
                run = run[key]
                break
        else:
            if "structures" in run:
                return None, run["structures"]
            raise DriftwatchError("task document has no dir_name/run_dir/path or structures")
    if isinstance(run, (list, tuple)):
        return None, run
    text = str(run)
    head, sep, tail = text.partition(":")
    if sep and "/" not in head and tail.startswith("/"):   # atomate2's "host:/path"
        text = tail
    return text, None


def _check(run, reject_on, config, include_record):
    from ..track import analyze
    codes = _codes(reject_on, "reject_on")
    out = {"passed": False, "verdict": None, "flags": [], "rejected_by": [], "summary": None,
           "source": None, "error": None, "reject_on": codes}
    if run is None:
        out["error"] = "no relaxation output (the relaxation failed or returned nothing)"
        return out
    try:
        path, structures = _path_of(run)
        target = path if structures is None else run_from_structures(structures)
        rec = analyze(target, config)
    except (DriftwatchError, OSError, ValueError) as exc:
        out["error"] = f"{type(exc).__name__}: {exc}"
        return out
    hits = rules.select(rec["flags"], codes)
    rec = json.loads(records.dumps(rec))               # plain JSON for the job store
    out.update(passed=not hits, verdict=rec["summary"]["verdict"]["direction"],
               flags=sorted({f["code"] for f in rec["flags"]}),
               rejected_by=[f"{f['code']} (step {f['step']}): {f['message']}" for f in hits],
               summary=rec["summary"], source=rec["run"]["source"])
    if include_record:
        out["record"] = rec
    return out


@dataclass
class SymmetryCheckMaker(Maker):
    """Maker of a symmetry check job for a relaxation's output.

    Args:
        name: job name.
        reject_on: flag codes (or what they concern) that fail the check.
        config: driftwatch preset name, YAML path or mapping (None: the default).
        stop_children_on_fail: stop the jobs that depend on this one when the check fails.
        include_record: put the whole run record in the output (it grows with the run length).

    ``make(run)`` takes a run folder or output file (``str``), a task document with ``dir_name``
    (atomate2's ``host:/path`` form is accepted), a list of structures (pymatgen ``Structure`` or its
    dict, or ASE ``Atoms``), or None.
    """

    name: str = "symmetry check"
    reject_on: list = field(default_factory=lambda: ["lattice-gained"])
    config: str | dict | None = None
    stop_children_on_fail: bool = True
    include_record: bool = True

    @job
    def make(self, run):
        out = _check(run, self.reject_on, self.config, self.include_record)
        return Response(output=out, stop_children=self.stop_children_on_fail and not out["passed"])


@job
def check_relaxation(run, reject_on=("lattice-gained",), config=None, stop_children_on_fail=True):
    """Function form of :class:`SymmetryCheckMaker` (same input and output)."""
    out = _check(run, list(reject_on), config, True)
    return Response(output=out, stop_children=stop_children_on_fail and not out["passed"])
