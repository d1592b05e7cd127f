"""custodian and jobflow integrations, run with the real libraries.

Sources for the behaviour checked (read in the installed packages, see ../shared/ecosystem.md B.3-B.5):
* custodian/custodian.py: a Validator's ``check`` returning True makes ``Custodian.run()`` raise
  ``ValidationError`` and skip ``postprocess``; monitors are polled while a ``Popen`` job runs;
  a correction with ``"actions": None`` from a handler with ``raises_runtime_error=False`` ends the
  run with a logged ``NonRecoverableError`` (``raises=False``), with True it raises.
* jobflow: ``Response(stop_children=True)`` keeps the jobs that depend on a job from running
  (``run_locally``); Makers are MSONable dataclasses.
* The replayed outputs are genuine pw.x 6.7 outputs (tests/data/qe); the toy job honours
  ``<prefix>.EXIT`` the way pw.x 6.7 was measured to (stop, "Program stopped by user request",
  JOB DONE, delete the file, exit status 2). The stop-handler test with pw.x itself runs the real code.
"""

from __future__ import annotations

import json
import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

custodian = pytest.importorskip("custodian")
jobflow = pytest.importorskip("jobflow")

from custodian.custodian import Custodian, Job, NonRecoverableError, ValidationError  # noqa: E402
from monty.json import MontyDecoder, MontyEncoder  # noqa: E402

from driftwatch.adapters import read_run  # noqa: E402
from driftwatch.integrations.custodian import SymmetryStopHandler, SymmetryValidator  # noqa: E402
from driftwatch.integrations.jobflow import SymmetryCheckMaker, check_relaxation  # noqa: E402

DATA = Path(__file__).parent / "data" / "qe"
COLLAPSED = DATA / "layer_oblique_to_hex"      # real pw.x: an oblique Si layer that snaps to hp
STEADY = DATA / "relax_atoms_to_sites"          # real pw.x: fixed-cell relax, no lattice change
QUICK = {"rules": {"persistence": {"steps": 2}}}  # live changes count after 2 steps (default 10)

REPLAY = r'''
import os, sys, time
src, delay = sys.argv[1], float(sys.argv[2])
exits = ["pw.EXIT", os.path.join("scratch", "pw.EXIT")]   # prefix 'pw', outdir './scratch'
with open(src) as fh, open("pw.out", "w") as out:
    for line in fh:
        out.write(line)
        out.flush()
        if line.startswith("!    total energy"):
            time.sleep(delay)
        if "Self-consistent Calculation" in line:
            for p in exits:
                if os.path.exists(p):
                    os.remove(p)
                    out.write("\n     Program stopped by user request\n\n"
                              "=" + "-" * 78 + "=\n   JOB DONE.\n=" + "-" * 78 + "=\n")
                    sys.exit(2)
'''


class ReplayJob(Job):
    """Toy custodian job: a Python process that writes a real pw.x output step by step."""

    def __init__(self, source, delay=0.0):
        self.source = str(source)
        self.delay = delay

    def setup(self, directory="./"):
        shutil.copy(Path(self.source).with_name("pw.in"), Path(directory) / "pw.in")
        (Path(directory) / "replay.py").write_text(REPLAY)

    def run(self, directory="./"):
        return subprocess.Popen([sys.executable, "replay.py", self.source, str(self.delay)],
                                cwd=directory)

    def postprocess(self, directory="./"):
        (Path(directory) / "postprocessed").write_text("ok\n")


class PwJob(Job):
    """custodian job running the real pw.x; ``linger``: seconds the job's process stays after
    pw.x has ended, with pw.x's exit code (as an MPI launcher finishing slowly would)."""

    def __init__(self, linger=0.0):
        self.linger = linger

    def setup(self, directory="./"):
        pass

    def run(self, directory="./"):
        env = dict(os.environ, OMP_NUM_THREADS="1")
        cmd = ["pw.x", "-in", "pw.in"] if not self.linger else \
            ["sh", "-c", f"pw.x -in pw.in; rc=$?; sleep {self.linger}; exit $rc"]
        with open(Path(directory) / "pw.out", "w") as out:
            return subprocess.Popen(cmd, cwd=directory, stdout=out, stderr=subprocess.STDOUT,
                                    env=env)

    def postprocess(self, directory="./"):
        pass


# ---------------------------------------------------------------- custodian
def test_validator_fails_a_collapsed_run_through_custodian(tmp_path):
    c = Custodian([], [ReplayJob(COLLAPSED / "pw.out")], validators=[SymmetryValidator()],
                  directory=str(tmp_path), polling_time_step=0.05, monitor_freq=1)
    with pytest.raises(ValidationError, match="SymmetryValidator"):
        c.run()
    assert not (tmp_path / "postprocessed").exists()           # custodian skips postprocess
    log = json.loads((tmp_path / "custodian.json").read_text())
    assert log[-1]["validator"]["@class"] == "SymmetryValidator"
    v = c.validators[0]
    assert "lattice-gained" in v.reason
    assert v.record["summary"]["verdict"]["direction"] == "gained"


def test_validator_passes_a_steady_run_and_round_trips(tmp_path):
    c = Custodian([], [ReplayJob(STEADY / "pw.out")], validators=[SymmetryValidator()],
                  directory=str(tmp_path), polling_time_step=0.05, monitor_freq=1)
    c.run()
    assert (tmp_path / "postprocessed").exists()
    v = SymmetryValidator(reject_on=["lattice-gained", "tolerance"], config="monolayer",
                          output="dw.json")
    again = json.loads(json.dumps(v, cls=MontyEncoder), cls=MontyDecoder)    # MSONable (B.5)
    assert isinstance(again, SymmetryValidator)
    assert again.reject_on == ["lattice-gained", "tolerance"]
    assert again.config == "monolayer" and again.output == "dw.json"
    empty = tmp_path / "empty"
    empty.mkdir()
    assert SymmetryValidator().check(str(empty)) is True          # cannot check -> fails
    assert SymmetryValidator(fail_unreadable=False).check(str(empty)) is False


def test_stop_handler_soft_stops_a_replayed_run(tmp_path):
    # the replayed layer reaches hp three steps before its end: a persistence of 2 steps lets the
    # soft stop act before the job ends (the default, 10 steps, would wait for the end)
    h = SymmetryStopHandler(stop_on=["lattice-gained"], fail_job=True, config=QUICK)
    assert (h.is_monitor, h.is_terminating) == (True, False)
    c = Custodian([h], [ReplayJob(COLLAPSED / "pw.out", delay=0.15)], directory=str(tmp_path),
                  polling_time_step=0.05, monitor_freq=1, max_errors=5)
    with pytest.raises(NonRecoverableError, match="SymmetryStopHandler"):   # fail_job=True
        c.run()
    full = read_run(COLLAPSED / "pw.out")
    got = read_run(tmp_path / "pw.out")
    assert len(got.cells) < len(full.cells)                     # stopped early, by itself
    assert "Program stopped by user request" in (tmp_path / "pw.out").read_text()
    corr = c.run_log[-1]["corrections"]
    stop = corr[0]["soft_stop"]
    assert stop["action"] == "wrote"
    assert Path(stop["path"]) == (tmp_path / "scratch" / "pw.EXIT").resolve()
    assert "lattice-gained" in stop["text"] and corr[0]["actions"] is None
    # the stop file says from which step the change held and at which step it was seen to last
    held, seen = (int(x) for x in __import__("re").search(
        r"holds from ionic step (\d+) \(seen at step (\d+)\)", stop["text"]).groups())
    assert seen - held + 1 >= 2                               # QUICK: 2 steps of persistence
    assert not Path(stop["path"]).exists()                      # the job consumed it
    again = json.loads(json.dumps(h, cls=MontyEncoder), cls=MontyDecoder)
    assert isinstance(again, SymmetryStopHandler) and again.fail_job is True


def test_stop_handler_leaves_a_finished_job_alone(tmp_path):
    """custodian checks its monitors once more after the job's process ends (and, with its
    defaults, only every 300 s while it runs). A job whose output has its end marker (pw.x's JOB
    DONE) is not stopped: no stop file is written into the finished folder (one left there stopped
    the next run at once, "Program stopped by user request", found by a field trial), and the
    validator, not the stop, judges it."""
    job = tmp_path / "job"
    shutil.copytree(COLLAPSED, job)
    assert "JOB DONE." in (job / "pw.out").read_text()
    h = SymmetryStopHandler(stop_on=["lattice-gained"], config=QUICK)
    assert h.check(str(job)) is False
    assert not list(tmp_path.rglob("*.EXIT"))
    cut = tmp_path / "running"                    # the same output while still being written
    cut.mkdir()
    shutil.copy(COLLAPSED / "pw.in", cut / "pw.in")
    text = (COLLAPSED / "pw.out").read_text()
    (cut / "pw.out").write_text(text[:text.rindex("End of BFGS")])
    h = SymmetryStopHandler(stop_on=["lattice-gained"], config=QUICK)
    assert h.check(str(cut)) is True


def test_stop_handler_dry_run_only_logs(tmp_path):
    h = SymmetryStopHandler(stop_on=["lattice-gained"], dry_run=True, config=QUICK)
    c = Custodian([h], [ReplayJob(COLLAPSED / "pw.out", delay=0.02)], directory=str(tmp_path),
                  polling_time_step=0.05, monitor_freq=1)
    c.run()                                                    # never enters error handling
    assert h.dry_runs and h.dry_runs[0]["action"] == "dry-run"
    assert not list(tmp_path.rglob("*.EXIT"))
    assert len(read_run(tmp_path / "pw.out").cells) == len(read_run(COLLAPSED / "pw.out").cells)
    assert (tmp_path / "postprocessed").exists()


@pytest.mark.pwx
@pytest.mark.skipif(shutil.which("pw.x") is None, reason="pw.x not on PATH")
@pytest.mark.parametrize("linger", [0.0, 1.0])
def test_stop_handler_with_real_pwx_under_custodian(tmp_path, linger):
    """The soft stop ends the custodian run as the handler's logged stop, also when the job's
    process outlives pw.x's "JOB DONE" by several polls (``linger``): custodian keeps only its
    last poll's answer, and pw.x stopped mid-SCF exits with code 2, which custodian would raise
    as ReturnCodeError (seen once under load before the handler reported the end at every
    check)."""
    from test_live import ALUMINIUM_VC_RELAX, PSEUDO
    (tmp_path / "pw.in").write_text(ALUMINIUM_VC_RELAX)
    shutil.copy(PSEUDO, tmp_path / PSEUDO.name)
    h = SymmetryStopHandler(stop_on=["lattice-nearing"], config=QUICK)   # nearing held 2 steps
    c = Custodian([h], [PwJob(linger)], directory=str(tmp_path), polling_time_step=0.1,
                  monitor_freq=1, max_errors=5)
    c.run()                                  # raises_runtime_error=False: returns, logs the stop
    text = (tmp_path / "pw.out").read_text()
    assert "Program stopped by user request" in text and "JOB DONE." in text
    corr = c.run_log[-1]["corrections"]
    assert corr[0]["soft_stop"]["path"].endswith("al7.EXIT")
    if linger:       # polls saw the job ended (with no linger pw.x may exit before the next poll)
        assert "the job ended after the soft stop" in corr[-1]["errors"][0]
    assert isinstance(c.run_log[-1]["handler"], SymmetryStopHandler)     # ended on this stop
    assert not list(tmp_path.rglob("*.EXIT"))
    assert len(read_run(tmp_path / "pw.out").cells) < 10       # the unstopped run takes 12


# ---------------------------------------------------------------- jobflow
def _flow(tmp_path, source):
    from jobflow import Flow, job

    @job
    def relaxation(src, folder):
        """Stands for a relaxation job: puts a real pw.x run folder in place, returns its path."""
        shutil.copytree(src, folder)
        return {"dir_name": f"node17:{folder}"}               # atomate2-style host:/path

    @job
    def downstream(verdict):
        return f"ran after {verdict}"

    relax = relaxation(str(source), str(tmp_path / "relax"))
    check = SymmetryCheckMaker(reject_on=["lattice-gained"]).make(relax.output)
    after = downstream(check.output["verdict"])
    return Flow([relax, check, after]), relax, check, after


def test_jobflow_check_stops_children_of_a_collapsed_run(tmp_path):
    from jobflow import run_locally
    flow, relax, check, after = _flow(tmp_path, COLLAPSED)
    responses = run_locally(flow, log=False)
    out = responses[check.uuid][1].output
    assert out["passed"] is False and out["verdict"] == "gained"
    assert "lattice-gained" in out["flags"]
    assert responses[check.uuid][1].stop_children is True
    assert after.uuid not in responses                          # the downstream job never ran
    assert out["record"]["schema"] == "driftwatch/run-2"


def test_jobflow_check_passes_a_steady_run_and_accepts_structures(tmp_path):
    from jobflow import run_locally
    flow, relax, check, after = _flow(tmp_path, STEADY)
    responses = run_locally(flow, log=False)
    assert responses[check.uuid][1].output["passed"] is True
    assert responses[after.uuid][1].output.startswith("ran after")
    # a list of pymatgen Structures (what a relaxation's task document holds per ionic step)
    from pymatgen.io.ase import AseAtomsAdaptor
    from ase.io import read
    structs = [AseAtomsAdaptor.get_structure(a) for a in read(COLLAPSED / "pw.out", ":")]
    j = check_relaxation(structs)
    got = run_locally(j, log=False)[j.uuid][1]
    assert got.output["passed"] is False and got.stop_children
    # the relaxation produced nothing (OnMissing.NONE): the check fails and says so
    j = check_relaxation(None)
    got = run_locally(j, log=False)[j.uuid][1].output
    assert got["passed"] is False and "no relaxation output" in got["error"]
    d = SymmetryCheckMaker(reject_on=["structure"]).as_dict()
    assert d["@class"] == "SymmetryCheckMaker" and d["reject_on"] == ["structure"]
