"""Long tasks (an audit's runs, a report's pages): progress on stderr shaped for where it goes, and
the start method of their process pools."""

from __future__ import annotations

import os
import sys
import time

__all__ = ["Progress", "progress_on", "mp_context"]


class Progress:
    """Progress of a long task on stderr, as the place it goes to wants it.

    On a terminal: one line rewritten in place (carriage return), at most 4 times a second. In a
    file or pipe (a batch job's log): a plain line with the date and time every ``interval``
    seconds and at the end, never a carriage return. ``enabled=False``: nothing.
    """

    def __init__(self, total: int, what: str, *, enabled: bool = True, initial: int = 0,
                 interval: float = 30.0, unit: str = "runs", stream=None):
        self.stream = sys.stderr if stream is None else stream
        self.enabled = enabled
        self.total, self.n, self.failed, self.what, self.unit = total, initial, 0, what, unit
        self.tty = bool(getattr(self.stream, "isatty", lambda: False)())
        # a terminal that cannot erase a line (TERM=dumb: an editor's shell, a batch console) gets
        # the line padded with spaces instead of the erase sequence it would print as ^[[K
        self._erase = "\033[K" if os.environ.get("TERM", "") != "dumb" else ""
        self._width = 0
        self.interval = 0.25 if self.tty else interval
        self.t0 = self._last = time.monotonic()
        self._start = initial
        if self.enabled and not self.tty and total:
            self._line(f"{total} {unit[:-1] if total == 1 else unit} to do"
                       + (f", {initial} already done (cache)" if initial else ""))

    def _line(self, text: str) -> None:
        stamp = time.strftime("%Y-%m-%d %H:%M:%S")
        self.stream.write(f"{stamp} {self.what}: {text}\n")
        self.stream.flush()

    def _text(self) -> str:
        done = self.n - self._start
        spent = time.monotonic() - self.t0
        left = ""
        if 0 < done and self.n < self.total:
            left = f", about {duration(spent / done * (self.total - self.n))} left"
        failed = f", {self.failed} failed" if self.failed else ""
        return (f"{self.n}/{self.total} {self.unit} ({100 * self.n // max(self.total, 1)} %){failed}, "
                f"{duration(spent)} elapsed{left}")

    def update(self, ok: bool = True) -> None:
        if not self.enabled:
            return
        self.n += 1
        self.failed += not ok
        self._show(self._text(), last=self.n >= self.total)

    def within(self, done: int, total: int, unit: str = "frames") -> None:
        """Progress inside the current item (a run of many frames asked of spglib one by one),
        shown beside the items' count at the same pace as :meth:`update`."""
        if self.enabled:
            self._show(f"{self._text()}; this run: {done:,}/{total:,} {unit} checked",
                       last=done >= total, end="")

    def busy(self, text: str) -> None:
        """What the current item is doing (spglib's calls on a large cell, runs being analysed by
        workers), shown beside the items' count at the same pace as :meth:`update`."""
        if self.enabled:
            self._show(f"{self._text()}; {text}", last=False, end="")

    def _show(self, text: str, last: bool, end: str | None = None) -> None:
        """``text`` at most every ``interval`` seconds (always when ``last``): in place on a
        terminal (a newline after the last, unless ``end`` says otherwise), else a dated line."""
        now = time.monotonic()
        if now - self._last < self.interval and not last:
            return
        self._last = now
        if self.tty:
            end = ("\n" if last else "") if end is None else end
            line = f"{self.what}: {text}"
            pad = "" if self._erase else " " * max(0, self._width - len(line))
            self._width = 0 if end else len(line)
            self.stream.write(f"\r{line}{pad}{self._erase}{end}")
            self.stream.flush()
        else:
            self._line(text)

    def grow(self, k: int) -> None:
        """``k`` more items to do (a task whose size is learnt as it goes)."""
        self.total += k

    def close(self, message: str | None = None) -> None:
        """End the line on a terminal; ``message``: one last line (on a terminal too)."""
        if not self.enabled:
            return
        if self.tty and 0 < self.n < self.total:
            self.stream.write("\n")
        if message:
            if self.tty:
                self.stream.write(f"{self.what}: {message}\n")
            else:
                self._line(message)
        self.stream.flush()


def duration(seconds: float) -> str:
    """Seconds in words: "0.4 s", "12 s", "3 min", "2 h 05 min"."""
    if seconds < 9.95:
        return f"{seconds:.1f} s"
    seconds = int(round(seconds))
    if seconds < 120:
        return f"{seconds} s"
    if seconds < 7200:
        return f"{seconds // 60} min"
    return f"{seconds // 3600} h {seconds % 3600 // 60:02d} min"


def progress_on(progress) -> bool:
    """``"auto"``: on, unless ``$DRIFTWATCH_PROGRESS`` says off; ``"on"``/``"off"`` as said. Where it
    goes decides its form (:class:`Progress`)."""
    if progress in (True, "on"):
        return True
    if progress in (False, "off"):
        return False
    env = os.environ.get("DRIFTWATCH_PROGRESS", "").strip().lower()
    return env not in ("0", "off", "false", "no")


def mp_context():
    """fork while this process has one thread (fastest); otherwise forkserver, else spawn (fork is
    unsafe once threads run: a Dask client, a watchdog)."""
    import multiprocessing as mp
    import threading
    methods = mp.get_all_start_methods()
    if "fork" in methods and threading.active_count() == 1:
        return mp.get_context("fork")
    return mp.get_context("forkserver" if "forkserver" in methods else "spawn")
