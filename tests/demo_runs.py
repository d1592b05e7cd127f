"""The bundled example runs (``example_runs/``) as test inputs: copy some into a campaign folder."""
from __future__ import annotations

import shutil
from pathlib import Path

DEMO = Path(__file__).resolve().parent.parent / "example_runs"


def copy_demo_runs(dest: Path, names) -> Path:
    """Copy the named example runs (files or run folders) into ``dest`` (created); returns it."""
    dest.mkdir(parents=True, exist_ok=True)
    for name in names:
        src = DEMO / name
        if src.is_dir():
            shutil.copytree(src, dest / name)
        else:
            shutil.copy(src, dest / name)
    return dest
