"""The command line and the Python API as users meet them: in a terminal pipe, in a batch log (no
terminal), in a notebook. Subprocesses of the real entry point; ASE, pymatgen and ase.db (SQLite)
are the outside references for what the API hands back.
"""

import ast
import json
import os
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import ase.db
import numpy as np
import pytest
from ase.io import read
from demo_runs import copy_demo_runs

import driftwatch
from driftwatch import records

REPO = Path(__file__).parent.parent
DEMO = REPO / "example_runs"


def dw(*args, env=None, timeout=300, **kw):
    e = dict(os.environ, **(env or {}))
    return subprocess.run([sys.executable, "-m", "driftwatch", *map(str, args)], capture_output=True,
                          text=True, timeout=timeout, env=e, **kw)


@pytest.fixture()
def camp(tmp_path):
    return copy_demo_runs(tmp_path / "camp", ("L01_qe_vcrelax", "L06_emt_bfgs.traj",
                                              "B05_emt_bfgs.extxyz"))


# ----------------------------------------------------------------------------- stdout and stderr
def test_summary_on_stdout_progress_and_notices_on_stderr(camp, tmp_path):
    (camp / "broken.traj").write_bytes(b"not a trajectory")
    r = dw("audit", camp, "-o", tmp_path / "out", "-j", "1")   # stdout and stderr are pipes here
    assert r.returncode == 4, r.stderr
    # what `driftwatch audit ... | grep gained` sees
    gained = [ln for ln in r.stdout.splitlines() if " gained " in ln and ln.startswith("camp/")]
    assert {ln.split()[0] for ln in gained} == {"camp/L01_qe_vcrelax", "camp/B05_emt_bfgs.extxyz"}
    assert "camp/broken.traj" in r.stdout and "failed" in r.stdout
    # a batch log gets dated progress lines, never a carriage return
    prog = [ln for ln in r.stderr.splitlines() if "driftwatch audit:" in ln and "runs" in ln
            and "could not" not in ln]
    assert prog and all(ln[:4].isdigit() and ln[4] == "-" for ln in prog)
    assert "\r" not in r.stderr and "4/4 runs (100 %)" in r.stderr
    assert "1 of 4 runs could not be analysed" in r.stderr
    # --progress off hides the progress only: the summary and the failures are still there
    r = dw("audit", camp, "-o", tmp_path / "out", "-j", "1", "--progress", "off")
    assert "camp/L01_qe_vcrelax" in r.stdout
    assert "runs to do" not in r.stderr and "runs (100 %)" not in r.stderr
    assert "1 of 4 runs could not be analysed" in r.stderr
    # --json: stdout is the JSON alone
    r = dw("audit", camp, "-o", tmp_path / "out", "-j", "1", "--json", "--progress", "off")
    assert json.loads(r.stdout)["runs"] == 4


def test_help_names_real_options_and_presets():
    h = " ".join(dw("inspect", "--help").stdout.split())       # argparse wraps the lines
    assert "driftwatch formats" in h and "--list-formats" not in h
    for preset in ("default", "monolayer", "bulk", "tolerance", "screen", "large"):
        assert preset in h
    assert "dated line every" in " ".join(dw("audit", "--help").stdout.split())  # --progress
    assert "--reject-on" in h and "--fail-on" not in h


def test_errors_speak_the_command_lines_terms(tmp_path):
    odd = tmp_path / "run.xyzzy"
    odd.write_text("hello\n")
    r = dw("inspect", odd)
    assert r.returncode == 1 and "--format" in r.stderr and "format=..." not in r.stderr
    cfg = tmp_path / "c.yaml"
    cfg.write_text("rules:\n  lattice:\n    within: 1e-3\n")          # YAML reads 1e-3 as text
    r = dw("inspect", DEMO / "L06_emt_bfgs.traj", "-c", cfg)
    assert r.returncode == 1 and "missing unit: write '1e-3 Å'" in r.stderr
    assert "e-3'" not in r.stderr.replace("1e-3", "")


def test_include_patterns_are_relative_to_the_root_and_empty_selections_fail(camp, tmp_path):
    r = dw("audit", camp, "-o", tmp_path / "o1", "-j", "1", "--include", "L0*", "--json",
           "--progress", "off")
    assert r.returncode == 0, r.stderr
    assert sorted(json.loads(r.stdout)["records"]) == ["camp/L01_qe_vcrelax",
                                                       "camp/L06_emt_bfgs.traj"]
    r = dw("audit", camp, "-o", tmp_path / "o2", "--include", "X9*")
    assert r.returncode == 1
    assert "--include 'X9*' left none of the 3 runs found" in r.stderr
    empty = tmp_path / "empty"
    empty.mkdir()
    r = dw("audit", empty, "-o", tmp_path / "o3")
    assert r.returncode == 1 and "no run found" in r.stderr and str(empty) in r.stderr


# ----------------------------------------------------------------------------- ase.db
def test_database_rows_are_updated_in_place(camp, tmp_path):
    out = tmp_path / "out"
    from driftwatch.campaign import audit
    audit([camp], out, workers=1, progress="off")
    db = ase.db.connect(out / "runs.db")
    ids = {row.run_id: row.id for row in db.select()}
    mtimes = {row.run_id: row.mtime for row in db.select()}
    audit([camp], out, workers=1, progress="off", use_cache=False)       # analysed again
    db = ase.db.connect(out / "runs.db")                                   # nothing changed:
    assert {row.run_id: row.mtime for row in db.select()} == mtimes        # no row rewritten
    (camp / "L06_emt_bfgs.traj").unlink()
    shutil.copy(DEMO / "L07_emt_fire.traj", camp / "L06_emt_bfgs.traj")  # a changed run
    audit([camp], out, workers=1, progress="off")
    db = ase.db.connect(out / "runs.db")
    assert db.count() == 3
    assert {row.run_id: row.id for row in db.select()} == ids               # same rows, same ids
    row = db.get(run_id="camp/L06_emt_bfgs.traj")
    assert row.mtime > mtimes["camp/L06_emt_bfgs.traj"]                    # the changed run's is
    assert row.natoms == len(read(DEMO / "L07_emt_fire.traj", -1))          # ASE: the new structure
    assert "flag_handedness_flip" not in row.key_value_pairs                # stale key removed
    keys = set().union(*(r.key_value_pairs for r in db.select()))
    assert {"verdict", "lattice_verdict", "drift_final", "group_final"} <= keys
    assert not [k for k in keys if k.startswith("dw_")]                     # one naming scheme


# ----------------------------------------------------------------------------- the Python API
def test_the_public_api_lists_itself_and_prints_short():
    names = dir(driftwatch)
    assert {"analyze", "read_run", "lattice2d", "lattice3d"} <= set(names)
    run = driftwatch.read_run(DEMO / "B05_emt_bfgs.extxyz")
    text = repr(run)
    assert len(text) < 200 and "16 frames" in text and "Pd4" in text and "array" not in text


def test_run_and_record_give_back_ase_and_pymatgen_structures():
    path = DEMO / "B05_emt_bfgs.extxyz"
    run = driftwatch.read_run(path)
    ref = read(path, ":")                                           # ASE's own extxyz reader
    first, last = run.to_atoms(0), run.to_atoms()
    assert np.allclose(first.cell.array, ref[0].cell.array)
    assert np.allclose(last.positions, ref[-1].positions)
    assert last.get_potential_energy() == pytest.approx(ref[-1].get_potential_energy())
    with pytest.raises(IndexError, match="out of range"):
        run.to_atoms(99)
    s = run.to_structure()
    from pymatgen.io.ase import AseAtomsAdaptor                     # pymatgen's own converter
    t = AseAtomsAdaptor.get_structure(ref[-1])
    assert s.matches(t) and np.allclose(s.lattice.matrix, t.lattice.matrix)
    rec = driftwatch.analyze(path)
    got = records.to_atoms(rec)                                     # the final structure is kept
    assert np.allclose(got.positions, ref[-1].positions) and got.info["step"] == 15
    with pytest.raises(KeyError, match="record.structures: all"):
        records.to_atoms(rec, 0)
    every = driftwatch.analyze(path, {"record": {"structures": "all"}})
    assert np.allclose(records.to_atoms(every, 3).cell.array, ref[3].cell.array)


def test_declared_dependencies_match_what_the_code_imports():
    """Every third-party module imported anywhere in driftwatch/ is declared in pyproject.toml
    (a dependency, or the extra of the module that needs it); tqdm is not used."""
    meta = tomllib.loads((REPO / "pyproject.toml").read_text())["project"]
    declared = " ".join(meta["dependencies"] + sum(meta["optional-dependencies"].values(), []))
    dist = {"yaml": "pyyaml", "distributed": "dask[distributed]"}
    found = set()
    for p in (REPO / "driftwatch").rglob("*.py"):
        for node in ast.walk(ast.parse(p.read_text(encoding="utf-8"))):
            names = ([a.name for a in node.names] if isinstance(node, ast.Import) else
                     [node.module] if isinstance(node, ast.ImportFrom) and node.level == 0 and
                     node.module else [])
            found |= {n.split(".")[0] for n in names}
    third = {m for m in found if m not in sys.stdlib_module_names and m != "driftwatch"}
    assert "tqdm" not in third
    for m in sorted(third):
        assert dist.get(m, m) in declared, f"{m} is imported but not declared"


def test_progress_on_a_terminal_that_cannot_erase_pads_its_line(monkeypatch):
    """On a terminal with TERM=dumb (an editor's shell, a batch console), which prints the erase
    sequence ESC [ K as ^[[K, the rewritten progress line is padded with spaces instead; on other
    terminals it ends with the erase sequence (common practice of terminal tools)."""
    import io

    from driftwatch.tasks import Progress

    class Tty(io.StringIO):
        def isatty(self):
            return True
    for term, erase in (("dumb", False), ("xterm-256color", True)):
        monkeypatch.setenv("TERM", term)
        out = Tty()
        p = Progress(3, "audit", stream=out, interval=0.0)
        p.interval = 0.0
        for _ in range(3):
            p.update()
        text = out.getvalue()
        assert ("\033[K" in text) is erase and text.endswith("\n")
        lines = text.split("\r")[1:]
        assert len(lines) == 3 and all(ln.startswith("audit: ") for ln in lines)
        if not erase:   # each rewrite covers the one before
            assert all(len(b.rstrip("\n")) >= len(a) for a, b in zip(lines, lines[1:]))


def test_the_readmes_python_block_runs_as_written(camp, tmp_path):
    """README.md's "From Python" block, run as a script with only its example paths replaced by
    real ones (a new user's field trial: `bases2d` and `cells` were never defined). Its comments'
    claims are checked against the objects it returns; the audit is run on the demo campaign."""
    text = (REPO / "README.md").read_text(encoding="utf-8")
    block = text.split("From Python:\n\n```python\n", 1)[1].split("```", 1)[0]
    block = (block.replace('"runs/L-01/"', repr(str(DEMO / "L01_qe_vcrelax")))
             .replace('["runs/"]', repr([str(camp)]))
             .replace('"driftwatch-audit"', repr(str(tmp_path / "audit"))))
    script = tmp_path / "readme_block.py"
    body = "".join("    " + ln if ln.strip() else ln for ln in block.splitlines(keepends=True))
    script.write_text("if __name__ == '__main__':\n" + body + "    print(repr(run))\n"
                      "    print(sorted(lattice2d.distances(bases2d)), bases2d.shape)\n"
                      "    print(summary['runs'])\n", encoding="utf-8")
    proc = subprocess.run([sys.executable, str(script)], capture_output=True, text=True,
                          timeout=600, cwd=tmp_path)
    assert proc.returncode == 0, proc.stderr[-3000:]
    out = proc.stdout.splitlines()
    assert out[0].startswith("<Run '") and "(espresso-out): 27 frames, Si2" in out[0]
    assert out[1] == "['hp', 'mirror', 'oc', 'op', 'tp'] (27, 2, 2)"
    assert out[2] == "3"
