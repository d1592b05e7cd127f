"""File access for adapters: regular files only, bounded decompression, complete lines only.

A file that is still being written (or was cut by a killed job) usually ends in
the middle of a line. :class:`Lines` never hands out that partial last line, so
a number cut in half can never be parsed as a smaller number.

Limits (hostile or broken files must fail fast, in bounded memory):

* Only regular files are opened: a FIFO, a device (``/dev/zero``) or a socket, directly or
  behind a symbolic link, is refused at open time (it could block or never end).
* A compressed input (``.gz``, ``.bz2``, ``.xz``) is decompressed in steps of at most
  :data:`STEP` bytes (never one large buffer re-copied on each read). It may decompress to at
  most :data:`MAX_DECOMPRESSED` bytes (``$DRIFTWATCH_MAX_DECOMPRESSED`` sets another limit) and,
  beyond :data:`RATIO_FLOOR` bytes, to at most :data:`MAX_RATIO` times the compressed bytes
  consumed, or :data:`MAX_TEXT_RATIO` times for text read line by line. Genuine VASP and pw.x
  outputs compress 5-15x; a stream of zeros or of blank lines 1000x (gzip) to 10^6x (bzip2, xz);
  a vasprun.xml with large all-zero projection blocks can reach a few hundred.
* A text line may hold at most :data:`MAX_LINE` characters.

Each limit raises :class:`~driftwatch.errors.InputError` naming the file and the limit.
"""
from __future__ import annotations

import bisect
import bz2
import codecs
import io
import itertools
import lzma
import os
import re
import stat
import zlib

from ..errors import InputError

__all__ = ["COMPRESSED", "STREAM_ERRORS", "open_bytes", "open_regular", "check_readable",
           "stream_truncated", "cut_stream", "CUT_COPY", "file_size", "peek", "strip_compression",
           "Lines", "tail_bytes",
           "max_decompressed", "quiet_numbers", "NotRegularFile", "MAX_DECOMPRESSED", "MAX_RATIO",
           "MAX_TEXT_RATIO", "RATIO_FLOOR", "MAX_LINE", "STEP"]

COMPRESSED = (".gz", ".bz2", ".xz")
_MAGIC = ((b"\x1f\x8b", "gz"), (b"BZh", "bz2"), (b"\xfd7zXZ\x00", "xz"))
STREAM_ERRORS = (EOFError, zlib.error, OSError, lzma.LZMAError)

MAX_DECOMPRESSED = 4_000_000_000
"""Bytes (4 GB): the most one compressed input may decompress to. ``$DRIFTWATCH_MAX_DECOMPRESSED``
overrides it (bytes, or with a decimal suffix: ``500M``, ``16G``)."""
MAX_RATIO = 1000
"""Decompressed bytes per compressed byte allowed beyond :data:`RATIO_FLOOR` (a bomb's
signature)."""
MAX_TEXT_RATIO = 300
"""The same for text read line by line (each line costs Python work: a bomb of blank lines must
stop early). Genuine line-oriented outputs (OUTCAR, pw.x, XDATCAR, extended XYZ) compress 5-15x; a
generated 2,000-step OUTCAR whose every step repeats the same padding blocks, 38x (gzip) and 113x
(xz)."""
RATIO_FLOOR = 1_000_000
"""Bytes: below this much output any compression ratio is accepted."""
MAX_LINE = 1 << 20
"""Characters (1,048,576): the longest text line a reader accepts (simulation outputs stay
below a few hundred; a line of zeros from a damaged or hostile file would otherwise be held
whole in memory)."""
STEP = 1 << 20
"""Bytes: the most output one decompression step produces (and the decompressor holds)."""
_IN_CHUNK = 1 << 14
_SUFFIX = {"": 1, "K": 10**3, "M": 10**6, "G": 10**9, "T": 10**12}


def max_decompressed() -> int:
    """The decompressed-size limit in bytes: ``$DRIFTWATCH_MAX_DECOMPRESSED`` or the default.
    Raises ValueError for a value that is not a size."""
    text = os.environ.get("DRIFTWATCH_MAX_DECOMPRESSED", "").strip()
    if not text:
        return MAX_DECOMPRESSED
    m = re.fullmatch(r"(\d+(?:\.\d*)?)\s*([kKmMgGtT]?)[bB]?", text)
    if not m:
        raise ValueError(f"$DRIFTWATCH_MAX_DECOMPRESSED={text!r} is not a size (bytes, or with "
                         f"k, M, G: e.g. 16G)")
    return int(float(m.group(1)) * _SUFFIX[m.group(2).upper()])


def strip_compression(name: str) -> str:
    """``OUTCAR.gz`` -> ``OUTCAR``."""
    for ext in COMPRESSED:
        if name.endswith(ext):
            return name[: -len(ext)]
    return name


# ---------------------------------------------------------------- regular files only
class NotRegularFile(InputError, OSError):
    """A FIFO, device, socket or folder where a file was expected (also an OSError, so code that
    skips unopenable files skips it too)."""


_KINDS = ((stat.S_ISFIFO, "FIFO"), (stat.S_ISCHR, "character device"),
          (stat.S_ISBLK, "block device"), (stat.S_ISSOCK, "socket"), (stat.S_ISDIR, "folder"))


def _kind_of(mode: int) -> str:
    return next((name for test, name in _KINDS if test(mode)), "special file")


def not_regular(path, mode: int) -> NotRegularFile:
    """The error for a path whose ``st_mode`` is not a regular file."""
    return NotRegularFile(path, f"not a regular file ({_kind_of(mode)}): refused, reading it "
                                f"could block or never end")


def open_regular(path):
    """Open ``path`` for binary reading if it is a regular file (a symbolic link is followed).

    FIFOs, devices and sockets are refused with :class:`NotRegularFile` without blocking: the
    file is opened non-blocking and checked with ``fstat`` before anything is read.
    """
    path = os.fspath(path)
    fd = os.open(path, os.O_RDONLY | getattr(os, "O_NONBLOCK", 0) | getattr(os, "O_CLOEXEC", 0))
    try:
        mode = os.fstat(fd).st_mode
        if not stat.S_ISREG(mode):
            raise not_regular(path, mode)
        if hasattr(os, "set_blocking"):
            os.set_blocking(fd, True)
        return os.fdopen(fd, "rb")
    except BaseException:
        os.close(fd)
        raise


def check_readable(path) -> None:
    """Raise InputError unless ``path`` is a regular file this process can open."""
    try:
        with open_regular(path):
            pass
    except InputError:
        raise
    except OSError as exc:
        raise InputError(path, f"cannot open ({exc.strerror or exc})") from None


def _kind(path):
    path = os.fspath(path)
    for ext, kind in ((".gz", "gz"), (".bz2", "bz2"), (".xz", "xz")):
        if path.endswith(ext):
            return kind
    with open_regular(path) as fh:
        head = fh.read(6)
    for magic, kind in _MAGIC:
        if head.startswith(magic):
            return kind
    return None


# ---------------------------------------------------------------- bounded decompression
_CUT: set = set()
"""Compressed files (absolute paths) whose stream ended before its end marker when last read."""
CUT_COPY = "its compressed stream ends early: an incomplete copy, or a job still writing it"


def cut_stream(path) -> bool:
    """Whether the compressed file ``path`` ended mid-stream when it was last read to its end
    (a copy cut short, not a whole file of a killed job)."""
    return os.path.abspath(path) in _CUT


class _Decompressed(io.RawIOBase):
    """Incremental, bounded decompression that survives a cut file.

    It returns every byte that could be decompressed and then reports EOF, setting
    ``truncated`` (the stdlib readers raise EOFError instead and drop the last decompressed
    block). Output comes in steps of at most :data:`STEP` bytes; concatenated members (gzip,
    bzip2, xz all allow them) are read one after the other. Exceeding :func:`max_decompressed`
    or ``max_ratio`` (decompressed per compressed byte consumed, beyond :data:`RATIO_FLOOR`)
    raises InputError naming the file.
    """

    _NEW = {"gz": lambda: zlib.decompressobj(16 + zlib.MAX_WBITS),
            "bz2": bz2.BZ2Decompressor, "xz": lzma.LZMADecompressor}

    def __init__(self, path, kind, max_ratio: float = MAX_RATIO):
        self.name = os.fspath(path)
        self.max_ratio = max_ratio
        try:
            self.limit = max_decompressed()
        except ValueError as exc:
            raise InputError(path, str(exc)) from None
        self._raw = open_regular(path)
        self._kind = kind
        self._d = self._NEW[kind]()
        self._pending = b""      # compressed bytes not yet handed to the decompressor
        self._out = b""          # the current step's output ...
        self._pos = 0            # ... and how much of it was read
        self._eof = False
        self.truncated = False
        self.produced = 0        # decompressed bytes so far
        self._read = 0           # compressed bytes read from the file so far

    def readable(self):
        return True

    def _read_raw(self) -> bytes:
        chunk = self._raw.read(_IN_CHUNK)
        self._read += len(chunk)
        return chunk

    @property
    def consumed(self) -> int:
        """Compressed bytes handed to the decompressor (bzip2 and xz buffer at most one chunk)."""
        return self._read - len(self._pending)

    def _cut(self) -> None:
        self.truncated = True
        _CUT.add(os.path.abspath(self.name))

    def _step(self) -> bytes:
        """Up to STEP bytes of output; b"" only at the end of the data."""
        d = self._d
        while True:
            if d.eof:                                # end of a member: another one may follow
                rest = d.unused_data + self._pending
                self._pending = b""
                if not rest:
                    rest = self._read_raw()
                    if not rest:
                        _CUT.discard(os.path.abspath(self.name))
                        return b""
                d = self._d = self._NEW[self._kind]()
                self._pending = rest
            if self._kind == "gz":
                if not self._pending:
                    self._pending = self._read_raw()
                    if not self._pending:            # no more input, member not finished
                        self._cut()
                        return d.flush()
                out = d.decompress(self._pending, STEP)
                self._pending = d.unconsumed_tail
            else:
                if d.needs_input:
                    if not self._pending:
                        self._pending = self._read_raw()
                        if not self._pending:
                            self._cut()
                            return b""
                    out = d.decompress(self._pending, STEP)
                    self._pending = b""
                else:
                    out = d.decompress(b"", STEP)
            if out:
                return out

    def _fill(self) -> None:
        if self._pos < len(self._out) or self._eof:
            return
        try:
            out = self._step()
        except (zlib.error, OSError, EOFError, lzma.LZMAError):
            out = b""
            self._cut()
        self._out, self._pos = out, 0
        if not out:
            self._eof = True
            return
        self.produced += len(out)
        if self.produced > self.limit:
            raise InputError(self.name, f"decompresses to more than {self.limit:,} bytes (the "
                                        f"limit; set $DRIFTWATCH_MAX_DECOMPRESSED to allow more, "
                                        f"e.g. 16G)")
        if self.produced > RATIO_FLOOR and self.produced > self.max_ratio * max(self.consumed, 1):
            raise InputError(self.name, f"decompresses to more than {self.max_ratio:g}x its "
                                        f"compressed size ({self.produced:,} bytes from "
                                        f"{self.consumed:,}): refused as a likely decompression "
                                        f"bomb (real outputs compress 5-15x); decompress it "
                                        f"yourself if it is genuine")

    def readinto(self, b):
        self._fill()
        n = min(len(b), len(self._out) - self._pos)
        b[:n] = self._out[self._pos:self._pos + n]
        self._pos += n
        return n

    def close(self):
        self._raw.close()
        super().close()


def open_bytes(path, *, max_ratio: float = MAX_RATIO):
    """Open a regular, possibly compressed file for buffered binary reading (bounded: see the
    module's limits). ``stream_truncated(fh)`` tells afterwards whether a compressed stream was cut.
    """
    kind = _kind(path)
    if kind is None:
        return open_regular(path)
    return io.BufferedReader(_Decompressed(os.fspath(path), kind, max_ratio),
                             buffer_size=1 << 16)


def stream_truncated(fh) -> bool:
    return bool(getattr(getattr(fh, "raw", None), "truncated", False))


def file_size(path) -> int:
    """Bytes of a file on disk (not decompressed); 0 when it is missing or cannot be stat'ed."""
    try:
        return os.stat(path).st_size
    except OSError:
        return 0


def peek(path, size: int = 50_000, start: int = 0) -> bytes:
    """The first ``size`` decompressed bytes (fewer if the file is shorter or cut), from byte
    ``start`` of the decompressed text."""
    try:
        with open_bytes(path) as fh:
            _skip(fh, start)
            return fh.read(size)
    except NotRegularFile:
        raise
    except STREAM_ERRORS:
        return b""


def _skip(fh, start: int) -> None:
    """Move a binary stream to byte ``start``: a seek where it can, else read past the bytes."""
    if not start:
        return
    if isinstance(getattr(fh, "raw", None), io.FileIO):        # a plain file
        fh.seek(start)
        return
    while start > 0:
        got = fh.read(min(start, 1 << 16))
        if not got:
            return
        start -= len(got)


_JOB_LOG = re.compile(r"^slurm-.*\.out$|\.o\d+$|\d{4,}[^/]*\.(out|log)$")


def job_log_name(name: str) -> bool:
    """A name a batch system gives a job's log (Slurm's ``slurm-JOB.out``, PBS's and SGE's
    ``NAME.oJOB``, or an ``*.out``/``*.log`` carrying a job number, as ``#SBATCH -o %x.%j.out``
    names it): the code's output may come after the site's prologue (module lists, an
    environment dump), so it is searched further than a plain output's first bytes."""
    return bool(_JOB_LOG.search(strip_compression(os.path.basename(name))))


def line_offsets(path, pattern: re.Pattern, limit: int | None = None,
                 key: bytes = b"") -> list[int]:
    """The decompressed byte offsets of the lines where ``pattern`` (a bytes regex anchored with
    ``^``, ``re.M``) matches, in file order, streamed in blocks; with ``limit``, the first one
    found within ``limit`` bytes only ([] if none). ``key``: a literal every match holds (blocks
    without it are passed over at ``bytes.find``'s speed). A cut compressed stream gives what it
    held."""
    out, base, carry = [], 0, b""
    try:
        with open_bytes(path) as fh:
            while limit is None or base < limit:
                block = fh.read(1 << 16)             # (memory stays flat)
                if not block:
                    break
                buf = carry + block
                cut = buf.rfind(b"\n") + 1
                if key in buf:
                    out += [base + m.start() for m in pattern.finditer(buf, 0, cut)]
                base, carry = base + cut, buf[cut:]
                if limit is not None and out:
                    break
            if limit is None or not out:
                out += [base + m.start() for m in pattern.finditer(carry)]
    except NotRegularFile:
        raise
    except STREAM_ERRORS:
        pass
    return [o for o in out if o < limit][:1] if limit is not None else out


class _Window:
    """The bytes ``[start, end)`` of a binary stream (``end`` None: to its end), read with
    ``read1`` as :class:`Lines` reads; ``raw`` is the stream's, so a cut stream still shows."""

    def __init__(self, fh, start: int, end: int | None):
        self._fh, self.raw = fh, getattr(fh, "raw", None)
        _skip(fh, start)
        self._left = None if end is None else end - start

    def read1(self, n: int) -> bytes:
        if self._left is not None:
            if self._left <= 0:
                return b""
            n = min(n, self._left)
        data = self._fh.read1(n)
        if self._left is not None:
            self._left -= len(data)
        return data

    def close(self):
        self._fh.close()


def tail_bytes(path, size: int = 8192) -> bytes:
    """The last ``size`` decompressed bytes; cheap (a seek) for uncompressed files."""
    if _kind(path) is None:
        with open_regular(path) as fh:
            fh.seek(0, os.SEEK_END)
            end = fh.tell()
            fh.seek(max(0, end - size))
            return fh.read()
    buf = b""
    try:
        with open_bytes(path) as fh:
            while True:
                block = fh.read(1 << 20)
                if not block:
                    break
                buf = (buf + block)[-size:]
    except NotRegularFile:
        raise
    except STREAM_ERRORS:
        pass
    return buf


def _lines_with(lines: list, keys: tuple) -> list:
    """Sorted indices of the ``lines`` (each ending in a newline) containing any of ``keys``."""
    text = "".join(lines)
    ends = list(itertools.accumulate(map(len, lines)))
    hits = set()
    for key in keys:
        at = text.find(key)
        while at >= 0:
            hits.add(bisect.bisect_right(ends, at))
            at = text.find(key, at + 1)
    return sorted(hits)


class Lines:
    """Iterate over the *complete* lines of a text file (decompressed on the fly).

    A line longer than :data:`MAX_LINE` characters raises InputError naming the file and the
    line number (nothing longer is ever held in memory). Also offers ``readline()`` and ``name``
    so it can be handed to ASE readers that expect a text file object. After iteration,
    ``cut_line`` is True when a partial last line was dropped and ``stream_error`` holds a
    decompression error (a cut ``.gz``), if any.
    """

    _READ = 1 << 16     # bytes decoded per read: lines are split from each block at once

    def __init__(self, path, encoding="utf-8", window: tuple | None = None):
        self.name = os.fspath(path)
        self._bin = open_bytes(path, max_ratio=MAX_TEXT_RATIO)
        if window is not None:              # (start, end) decompressed bytes: a part of the file
            self._bin = _Window(self._bin, *window)
        # what io.TextIOWrapper(errors="replace", newline=None) does: \r\n and \r read as \n
        self._decode = io.IncrementalNewlineDecoder(
            codecs.getincrementaldecoder(encoding)(errors="replace"), translate=True).decode
        self.cut_line = False
        self.stream_error: str | None = None
        self.lineno = 0
        self._lines: list[str] = []     # complete lines read ahead, each ending in "\n"
        self._next = 0
        self._part = ""                 # the start of the line after them, not complete yet
        self._too_long = False          # the line after the buffered ones exceeds MAX_LINE
        self._marked: tuple = (None, [])     # (keys, indices of the buffered lines with them)
        self._done = False

    def readline(self) -> str:
        if self._next < len(self._lines):
            self._next += 1
            self.lineno += 1
            return self._lines[self._next - 1]
        return self._read_ahead()

    def read_lines(self, n: int) -> list[str]:
        """The next ``n`` lines (fewer only at the end of the text): what ``n`` calls of
        ``readline`` give, sliced from the decoded block where it holds them."""
        out = self._lines[self._next:self._next + n]
        self._next += len(out)
        self.lineno += len(out)
        while len(out) < n:
            line = self.readline()
            if not line:
                break
            out.append(line)
        return out

    def skip_to(self, keys: tuple) -> str:
        """The next line containing any of ``keys`` (literal texts without a newline), or "" at
        the end of the text; the lines before it are passed over (and counted). The same lines
        as testing ``any(k in line for k in keys)`` line by line, found with one ``str.find``
        pass per key over each decoded block."""
        while True:
            if self._marked[0] is not keys:
                self._marked = (keys, _lines_with(self._lines, keys))
            marks = self._marked[1]
            i = bisect.bisect_left(marks, self._next)
            if i < len(marks):
                j = marks[i]
                self.lineno += j + 1 - self._next
                self._next = j + 1
                return self._lines[j]
            self.lineno += len(self._lines) - self._next
            self._next = len(self._lines)
            line = self._read_ahead()           # a new block (its first line already read)
            if not line or any(k in line for k in keys):
                return line

    def _read_ahead(self) -> str:
        """Decode the next block (``read1``: what the stream has, so the lines before a cut in a
        compressed stream are all delivered), keep its complete lines and return the first;
        "" at the end."""
        while True:
            if self._too_long:
                raise InputError(self.name, f"line {self.lineno + 1} is longer than {MAX_LINE:,} "
                                            f"characters: not a text output of a simulation code "
                                            f"(damaged, or binary data)")
            if self._done:
                return ""
            try:
                data = self._bin.read1(self._READ)
            except NotRegularFile:
                raise
            except STREAM_ERRORS as exc:
                self.stream_error = f"{type(exc).__name__}: {exc}"
                data = None
            text = self._part + self._decode(data or b"", not data)
            cut = text.rfind("\n") + 1
            self._part = text[cut:]
            lines = io.StringIO(text[:cut]).readlines()     # each ending in its "\n"
            if lines and max(map(len, lines)) > MAX_LINE + 1:
                del lines[next(k for k, ln in enumerate(lines) if len(ln) > MAX_LINE + 1):]
                self._too_long = True
            elif len(self._part) > MAX_LINE:
                self._too_long = True
            elif not data:                  # the end: a partial last line is dropped
                self.cut_line = bool(self._part) and data is not None
                self._done = True
            self._lines, self._next = lines, 0
            self._marked = (None, [])
            if lines:
                return self.readline()

    def __iter__(self):
        return self

    def __next__(self) -> str:
        line = self.readline()
        if not line:
            raise StopIteration
        return line

    @property
    def cut(self) -> bool:
        """True when the text ended abnormally (partial last line or cut compressed stream)."""
        return self.cut_line or self.stream_error is not None or stream_truncated(self._bin)

    def close(self):
        self._bin.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()


def quiet_numbers(frames, ctx):
    """Iterate a reader's frames with numpy's floating-point warnings caught.

    Values beyond the double range in a file (``1e400``, or a unit conversion of ``1e308``) make
    numpy print RuntimeWarnings on the terminal; here they become one warning of the run, in
    words, naming the file (the frames' checks then refuse a non-finite cell or position).
    """
    import numpy as np
    seen: dict = {}
    done = 0

    def note(kind, _flag):
        seen.setdefault(kind, done)

    frames = iter(frames)
    while True:
        with np.errstate(over="call", invalid="call", divide="call", under="ignore", call=note):
            try:
                frame = next(frames)
            except StopIteration:
                break
        yield frame
        done += 1
    if seen:
        kinds = " and ".join(sorted(seen))
        ctx.warn(f"numbers beyond the floating-point range in the file (numpy: {kinds}, first "
                 f"after {min(seen.values())} completed steps); those values became inf or NaN")
