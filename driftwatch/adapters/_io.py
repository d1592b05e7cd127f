"""File access for adapters: transparent decompression and complete lines only.

A file that is still being written (or was cut by a killed job) usually ends in
the middle of a line. :class:`Lines` never hands out that partial last line, so
a number cut in half can never be parsed as a smaller number.
"""
from __future__ import annotations

import bz2
import io
import lzma
import os
import zlib

__all__ = ["COMPRESSED", "STREAM_ERRORS", "open_bytes", "stream_truncated", "peek",
           "strip_compression", "Lines", "tail_bytes"]

COMPRESSED = (".gz", ".bz2", ".xz")
_MAGIC = ((b"\x1f\x8b", "gz"), (b"BZh", "bz2"), (b"\xfd7zXZ\x00", "xz"))
STREAM_ERRORS = (EOFError, zlib.error, OSError, lzma.LZMAError)


def strip_compression(name: str) -> str:
    """``OUTCAR.gz`` -> ``OUTCAR``."""
    for ext in COMPRESSED:
        if name.endswith(ext):
            return name[: -len(ext)]
    return name


def _kind(path):
    path = os.fspath(path)
    for ext, kind in ((".gz", "gz"), (".bz2", "bz2"), (".xz", "xz")):
        if path.endswith(ext):
            return kind
    with open(path, "rb") as fh:
        head = fh.read(6)
    for magic, kind in _MAGIC:
        if head.startswith(magic):
            return kind
    return None


class _Decompressed(io.RawIOBase):
    """Incremental decompression that survives a cut file: it returns every byte that could
    be decompressed and then reports EOF, setting ``truncated`` (the stdlib readers raise
    EOFError instead and drop the last decompressed block)."""

    _NEW = {"gz": lambda: zlib.decompressobj(16 + zlib.MAX_WBITS),
            "bz2": bz2.BZ2Decompressor, "xz": lzma.LZMADecompressor}

    def __init__(self, path, kind):
        self._raw = open(path, "rb")
        self._kind = kind
        self._d = self._NEW[kind]()
        self._buf = b""
        self._eof = False
        self.truncated = False

    def readable(self):
        return True

    def _fill(self):
        while not self._buf and not self._eof:
            chunk = self._raw.read(1 << 16)
            if not chunk:
                self._eof = True
                self.truncated = not self._d.eof
                return
            try:
                out = self._d.decompress(chunk)
                while self._d.eof and self._d.unused_data:      # concatenated members
                    rest = self._d.unused_data
                    self._d = self._NEW[self._kind]()
                    out += self._d.decompress(rest)
            except (zlib.error, OSError, EOFError, lzma.LZMAError):
                self._eof = self.truncated = True
                return
            self._buf = out

    def readinto(self, b):
        self._fill()
        n = min(len(b), len(self._buf))
        b[:n] = self._buf[:n]
        self._buf = self._buf[n:]
        return n

    def close(self):
        self._raw.close()
        super().close()


def open_bytes(path):
    """Open a (possibly compressed) file for buffered binary reading.

    ``stream_truncated(fh)`` tells afterwards whether a compressed stream was cut.
    """
    kind = _kind(path)
    if kind is None:
        return open(os.fspath(path), "rb")
    return io.BufferedReader(_Decompressed(os.fspath(path), kind), buffer_size=1 << 16)


def stream_truncated(fh) -> bool:
    return bool(getattr(getattr(fh, "raw", None), "truncated", False))


def peek(path, size: int = 50_000) -> bytes:
    """The first ``size`` decompressed bytes (fewer if the file is shorter or cut)."""
    try:
        with open_bytes(path) as fh:
            return fh.read(size)
    except STREAM_ERRORS:
        return b""


def tail_bytes(path, size: int = 8192) -> bytes:
    """The last ``size`` decompressed bytes; cheap (a seek) for uncompressed files."""
    if _kind(path) is None:
        with open(path, "rb") as fh:
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
    except STREAM_ERRORS:
        pass
    return buf


class Lines:
    """Iterate over the *complete* lines of a text file (decompressed on the fly).

    Also offers ``readline()`` and ``name`` so it can be handed to ASE readers
    that expect a text file object. After iteration, ``cut_line`` is True when a
    partial last line was dropped and ``stream_error`` holds a decompression
    error (a cut ``.gz``), if any.
    """

    def __init__(self, path, encoding="utf-8"):
        self.name = os.fspath(path)
        self._bin = open_bytes(path)
        self._fh = io.TextIOWrapper(self._bin, encoding=encoding, errors="replace", newline=None)
        self.cut_line = False
        self.stream_error: str | None = None
        self.lineno = 0
        self._done = False

    def readline(self) -> str:
        if self._done:
            return ""
        try:
            line = self._fh.readline()
        except STREAM_ERRORS as exc:
            self.stream_error = f"{type(exc).__name__}: {exc}"
            line = ""
        if not line.endswith("\n"):
            self.cut_line = bool(line)
            self._done = True
            return ""
        self.lineno += 1
        return line

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
        self._fh.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
