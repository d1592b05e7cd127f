"""Shared test fixtures."""

import os
import shutil
import tempfile

import pytest


@pytest.fixture
def killable_env():
    """Environment for a child process the test kills: its temporary folders (multiprocessing's
    ``pymp-*``, which a killed process cannot remove) go to a short folder of its own, removed
    afterwards. Short: a forkserver's socket path must fit in 108 bytes (AF_UNIX, common practice)."""
    scratch = tempfile.mkdtemp(prefix="dwk-")
    yield dict(os.environ, TMPDIR=scratch)
    shutil.rmtree(scratch, ignore_errors=True)
