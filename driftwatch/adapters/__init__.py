"""Adapters: every supported format in, one stream of frames out.

``read_run(path, format=None) -> Run`` and ``iter_frames(path, format=None)`` read
a file or a VASP / Quantum ESPRESSO run folder; ``formats()`` lists the registry,
``detect(path)`` names the format that would be used, and ``register(...)`` adds
one. See :mod:`driftwatch.adapters.registry` for the detection rules.
"""
from .registry import detect, formats, iter_frames, read_run, register
from .run import Frame, ReadContext, Run

__all__ = ["read_run", "iter_frames", "register", "detect", "formats", "Run", "Frame",
           "ReadContext"]
