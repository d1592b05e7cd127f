"""custodian integration: a Validator that fails collapsed runs and a monitor that soft-stops them.

Spec-file use (custodian's own YAML; names are dotted paths)::

    handlers:
      - hdlr: driftwatch.integrations.custodian.SymmetryStopHandler
        params: {stop_on: [lattice-gained]}
    validators:
      - vldr: driftwatch.integrations.custodian.SymmetryValidator
        params: {reject_on: [lattice-gained, handedness-flip]}

How custodian treats them (read from ``custodian/custodian.py``, checked with real runs in
``tests/test_integrations.py``):

* ``SymmetryValidator.check(directory)`` runs after a job that ended with no handler errors; True
  means failure, and custodian then raises ``ValidationError`` out of ``Custodian.run()``.
* ``SymmetryStopHandler`` is a monitor (``is_monitor=True``) that never lets custodian kill the job
  (``is_terminating=False``). When a ``stop_on`` flag is raised (a change that held for
  ``rules.persistence.steps`` steps), ``correct`` writes the code's stop file
  (VASP ``STOPCAR`` / pw.x ``<prefix>.EXIT``) and the code stops itself cleanly. ``correct`` returns
  ``"actions": None``: a correction *with* actions makes custodian rerun the job, which a collapsed
  structure does not need. Once the stopped job has written its end marker the handler reports at
  every check (custodian keeps only its last poll's answer, and a job still exiting would be
  polled again; pw.x stopped mid-SCF returns a non-zero code, which custodian would raise as
  ``ReturnCodeError``), so custodian ends the run as an unrecoverable error of this handler:
  ``Custodian.run()`` returns normally and records it (``raises_runtime_error=False``, the
  default), or raises ``NonRecoverableError`` with ``fail_job=True``. Later jobs of that
  custodian run are not started.
"""

from __future__ import annotations

import logging
from pathlib import Path

from custodian.custodian import ErrorHandler, Validator

from .. import records, rules
from ..errors import DriftwatchError, InputError
from ..live import (Tracker, _codes, _end_marker, _needs_spectra, _read, check_run,
                    code_of_format, request_stop, stop_reason)

__all__ = ["SymmetryValidator", "SymmetryStopHandler"]

logger = logging.getLogger(__name__)


class SymmetryValidator(Validator):
    """Fails (``check`` returns True) a finished job whose run raised a ``reject_on`` flag.

    Args:
        reject_on: flag codes (or what they concern: lattice, structure, tolerance, code, any)
            that fail the job.
        config: driftwatch preset name, YAML path or mapping (None: the default config).
        output: also write the run record here (relative paths are inside the job directory).
        fail_unreadable: a run folder with no readable relaxation also fails (the check could not
            be made); False lets it pass.

    After ``check``, ``.record`` holds the record and ``.reason`` says why it failed.
    """

    def __init__(self, reject_on=("lattice-gained",), config=None, output=None,
                 fail_unreadable=True):
        self.reject_on = _codes(reject_on, "reject_on")
        self.config = config
        self.output = output
        self.fail_unreadable = fail_unreadable
        self.record = None
        self.reason = None

    def check(self, directory="./") -> bool:
        try:
            passed, rec = check_run(directory, config=self.config, reject_on=self.reject_on)
        except InputError as exc:
            self.reason = f"driftwatch could not check the run: {exc}"
            logger.error(self.reason)
            return bool(self.fail_unreadable)
        self.record = rec
        if self.output:
            out = Path(self.output)
            records.write_json(rec, out if out.is_absolute() else Path(directory) / out)
        if passed:
            self.reason = None
            return False
        hits = rules.select(rec["flags"], self.reject_on)
        self.reason = "; ".join(f"{f['code']} (step {f['step']}): {f['message']}" for f in hits)
        logger.error(f"driftwatch: {self.reason}")
        return True


class SymmetryStopHandler(ErrorHandler):
    """Monitor: follows the job's output and requests the code's soft stop when a flag is raised.

    Args:
        stop_on: flag codes (or what they concern) that request the stop.
        config: driftwatch preset name, YAML path or mapping.
        dry_run: only log what would be written; never enters custodian's error handling.
        fail_job: make custodian raise ``NonRecoverableError`` after the stopped job ended
            (default: ``Custodian.run()`` returns and the run log records the stop).
        prefix, outdir: pw.x settings for the ``.EXIT`` file when the input is not in the folder.

    Works for VASP and pw.x run folders (the code is told by the output found there).
    """

    is_monitor = True
    is_terminating = False
    raises_runtime_error = False

    def __init__(self, stop_on=("lattice-gained",), config=None, dry_run=False, fail_job=False,
                 prefix=None, outdir=None):
        self.stop_on = _codes(stop_on)
        self.config = config
        self.dry_run = dry_run
        self.fail_job = fail_job
        self.raises_runtime_error = bool(fail_job)
        self.prefix = prefix
        self.outdir = outdir
        self._tracker = None
        self._flag = None          # the flag raised (pending correct)
        self._stop = None          # the stop request made for this output
        self._left = None          # at the first end report: did the code leave our stop file
        self.dry_runs: list[dict] = []

    def _follow(self, directory) -> dict | None:
        frames, ctx, _ = _read(directory, None)
        if not frames:
            return None
        from ..adapters import detect
        fmt = detect(directory)
        t = self._tracker
        if t is None or t.source != ctx.path or len(frames) < len(t):
            t = self._tracker = Tracker(self.config, source=ctx.path, format=fmt,
                                        run_dir=str(directory))
            self._stop, self._left = None, None
        t.warnings, t.code_settings, t.rounding = list(ctx.warnings), dict(ctx.settings), ctx.rounding
        t.replace(frames)
        return t.record(newest=_needs_spectra(self.stop_on))

    def check(self, directory="./") -> bool:
        if self._stop is not None:
            # stop requested: report the job's end at every check once its end marker is written.
            # custodian keeps only its last poll's answer, so one report could be cleared by a
            # poll that comes while the code, done, still exits (pw.x then returns a non-zero code
            # and custodian would raise ReturnCodeError instead of ending on this stop)
            return _end_marker(self._tracker.source, self._tracker.format) is not None
        try:
            rec = self._follow(directory)
        except DriftwatchError as exc:
            logger.warning(f"driftwatch: cannot follow {directory}: {exc}")
            return False
        if rec is None or code_of_format(self._tracker.format) is None:
            return False
        if _end_marker(self._tracker.source, self._tracker.format) is not None:
            return False       # the job has ended: nothing to stop (the validator judges it)
        hits = rules.select(rec["flags"], self.stop_on)
        if not hits:
            return False
        if self.dry_run:
            info = self._request(directory, hits[0], dry_run=True)
            if not any(d["path"] == info["path"] for d in self.dry_runs):
                self.dry_runs.append(info)
                logger.warning(f"driftwatch (dry run): would write {info['path']}: {info['reason']}")
            return False
        self._flag = hits[0]
        return True

    def _request(self, directory, flag, dry_run):
        reason = stop_reason(self._tracker, flag)
        return request_stop(directory, code_of_format(self._tracker.format), reason=reason,
                            dry_run=dry_run, prefix=self.prefix, outdir=self.outdir)

    def correct(self, directory="./") -> dict:
        if self._stop is None:
            flag = self._flag
            self._stop = self._request(directory, flag, dry_run=False)
            self._stop["flag"] = dict(flag)
            msg = (f"driftwatch: {flag['code']} at step {flag['step']}: {flag['message']}; "
                   f"soft stop requested ({self._stop['action']} {self._stop['path']})")
            return {"errors": [msg], "actions": None, "soft_stop": self._stop}
        if self._left is None:
            self._left = self._tidy()
        msg = (f"driftwatch: the job ended after the soft stop requested at step "
               f"{self._stop['flag']['step']} ({self._stop['flag']['code']})")
        return {"errors": [msg], "actions": None, "soft_stop": self._stop,
                "stop_file_left_by_code": self._left}

    def _tidy(self) -> bool:
        """Remove our stop file if the code left it (so a restart does not stop at once)."""
        p = Path(self._stop["path"])
        try:
            if self._stop["action"] == "wrote" and p.is_file() and \
                    p.read_text(encoding="utf-8") == self._stop["text"]:
                p.unlink()
                return True
        except OSError:
            pass
        return False
