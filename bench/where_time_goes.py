"""Where an audit's CPU goes once the process has started: reading, the analysis besides spglib,
spglib itself, and the audit around them (records, runs.db, tables, the report).

    python bench/where_time_goes.py                  # 36 variable-cell 48-atom runs (bench/run.py's)
    python bench/where_time_goes.py --cell fc --atoms 192 --mode screen --rounds 3

Everything is imported (ASE's database, driftwatch, the report) and the lattice tables are built
before the clock starts, so the numbers are what a campaign of many runs approaches per run; the
start-up itself is measured by ``bench/run.py`` (section ``startup``). spglib's share is the CPU
inside driftwatch's uncached calls to spglib (each distinct question once, as in the audit). The
campaign is bench/make_inputs.py's mixed campaign (vasprun.xml, OUTCAR, pw.x in turn, 50 steps),
generated into ``--inputs`` if missing. One line per round; compare rounds, the machine is shared.
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import time
import warnings
from pathlib import Path

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
sys.path.insert(0, str(Path(__file__).resolve().parent))

import make_inputs  # noqa: E402
from run import FC_RUNS, TARGET_RUNS, VC_RUNS, bench_config  # noqa: E402


def main(argv=None) -> int:
    p = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    p.add_argument("--cell", choices=("vc", "fc"), default="vc")
    p.add_argument("--atoms", type=int, default=48)
    p.add_argument("--runs", type=int, default=None, help="default: as bench/run.py (vc: 36 at 48 atoms, else 9; fc: 3)")
    p.add_argument("--mode", choices=("default", "screen", "every"), default="default",
                   help="bench/run.py's mode (its config: the preset, 8 common symprecs)")
    p.add_argument("--rounds", type=int, default=2)
    p.add_argument("--inputs", default="/tmp/driftwatch-bench")
    a = p.parse_args(argv)
    warnings.simplefilter("ignore")
    import ase.db  # noqa: F401  (runs.db is written through it)
    import driftwatch.report.html  # noqa: F401
    from driftwatch import adapters, lattice3d, symmetry, track
    from driftwatch.campaign import audit

    runs = a.runs or ((TARGET_RUNS if a.atoms == 48 else VC_RUNS) if a.cell == "vc" else FC_RUNS)
    paths = make_inputs.make_mixed(Path(a.inputs), a.cell, a.atoms, runs, 50)
    root = make_inputs.mixed_dir(Path(a.inputs), a.cell, a.atoms)
    cfg = bench_config(a.mode, a.inputs)
    lattice3d.invariants(lattice3d.np.eye(3) * 3.0)          # build the lattice tables once
    spent = [0.0]
    ask = symmetry._dataset_uncached

    def timed_ask(*args):
        c = time.process_time()
        try:
            return ask(*args)
        finally:
            spent[0] += time.process_time() - c

    symmetry._dataset_uncached = timed_ask
    out = Path(a.inputs) / "work" / "where-time-goes"
    print(f"{a.cell}-{a.atoms}: {runs} runs x 50 steps, mode {a.mode}; CPU s per round")
    for r in range(a.rounds):
        c = time.process_time()
        read = [adapters.read_run(p) for p in paths]
        t_read = time.process_time() - c
        symmetry.clear_cache()
        spent[0] = 0.0
        c = time.process_time()
        for run in read:
            track.record_from_run(run, cfg)
        t_analysis, t_spglib = time.process_time() - c, spent[0]
        whole = {}
        for report in (False, True):
            shutil.rmtree(out, ignore_errors=True)
            symmetry.clear_cache()
            spent[0] = 0.0
            c = time.process_time()
            audit([str(root)], str(out), config=cfg, progress="off", quiet=True, report=report,
                  workers=1)
            whole[report] = time.process_time() - c, spent[0]
        (a_no, s_no), (a_rep, s_rep) = whole[False], whole[True]
        print(f"  round {r + 1}: reading {t_read:.2f} | analysis {t_analysis:.2f} (spglib "
              f"{t_spglib:.2f}, the rest {t_analysis - t_spglib:.2f}) | audit without report "
              f"{a_no:.2f} (spglib {s_no:.2f}), with report {a_rep:.2f} (spglib {s_rep:.2f}) -> "
              f"audit with report / spglib x{a_rep / s_rep:.2f}; beside spglib: reading "
              f"{t_read / s_rep:.0%}, analysis {(t_analysis - t_spglib) / s_rep:.0%}, the rest of the "
              f"audit (records, runs.db, tables) "
              f"{(a_no - s_no - t_read - t_analysis + t_spglib) / s_rep:.0%}, "
              f"report {(a_rep - a_no) / s_rep:.0%} of spglib's time")
        print(f"    (1.15x of spglib leaves {0.15 * s_rep:.2f} s for all of it; reading alone took "
              f"{t_read:.2f} s)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
