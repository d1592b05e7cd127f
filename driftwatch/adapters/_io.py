"""File access for adapters: transparent decompression and complete lines only.

A file that is still being written (or was cut by a killed job) usually ends in
the middle of a line. :class:`Lines` never hands out that partial last line, so
a number cut in half can never be parsed as a smaller number.
"""
from __future__ import annotations

import bz2
import gzip
import io
import lzma
import os
import zlib

__all__ = ["COMPRESSED", "open_bytes", "peek", "strip_compression", "Lines", "tail_bytes"]

COMPRESSED = {".gz": gzip.open, ".bz2": bz2.open, ".xz": lzma.open}
_MAGIC = ((b"\x1f\x8b", gzip.open), (b"BZh", bz2.open), (b"\xfd7zXZ\x00", lzma.open))
_STREAM_ERRORS = (EOFError, zlib.error, OSError, lzma.LZMAError)


def strip_compression(name: str) -> str:
    """``OUTCAR.gz`` -> ``OUTCAR``."""
    for ext in COMPRESSED:
        if name.endswith(ext):
            return name[: -len(ext)]
    return name


def _opener(path):
    path = os.fspath(path)
    for ext, fn in COMPRESSED.items():
        if path.endswith(ext):
            return fn
    with open(path, "rb") as fh:
        head = fh.read(6)
    for magic, fn in _MAGIC:
        if head.startswith(magic):
            return fn
    return open


def open_bytes(path):
    """Open a (possibly compressed) file for binary reading."""
    return _opener(path)(os.fspath(path), "rb")


def peek(path, size: int = 50_000) -> bytes:
    """The first ``size`` decompressed bytes (fewer if the file is shorter or cut)."""
    try:
        with open_bytes(path) as fh:
            return fh.read(size)
    except _STREAM_ERRORS:
        return b""


def tail_bytes(path, size: int = 8192) -> bytes:
    """The last ``size`` decompressed bytes; cheap (a seek) for uncompressed files."""
    if _opener(path) is open:
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
    except _STREAM_ERRORS:
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
        self._fh = io.TextIOWrapper(open_bytes(path), encoding=encoding, errors="replace",
                                    newline=None)
        self.cut_line = False
        self.stream_error: str | None = None
        self.lineno = 0
        self._done = False

    def readline(self) -> str:
        if self._done:
            return ""
        try:
            line = self._fh.readline()
        except _STREAM_ERRORS as exc:
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
        """True when the text ended abnormally (partial last line or broken compression)."""
        return self.cut_line or self.stream_error is not None

    def close(self):
        self._fh.close()

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.close()
