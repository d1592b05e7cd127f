"""What the HTML report costs beside the analysis, and a warm re-audit with the report.

    python bench/report_cost.py                       # 40 runs x 50 steps x 48 atoms, vasprun.xml
    python bench/report_cost.py --runs 200 --atoms 4 --format outcar --workers 2

On a generated campaign (bench/make_inputs.py's relaxations, written into run folders named
``cell-NNNN``) it times, in one process, wall clock and CPU (this process and its finished workers):

1. a cold audit without the report (the analysis);
2. the report alone, built from those records into an empty folder, with the audit's workers and
   with one process;
3. a cold audit with the report (a fresh output folder);
4. a warm re-audit of that folder with the report (every run cached, every page unchanged);
5. for reference, one run page's plots drawn as matplotlib Figures and saved as SVG (what the report
   did before its own SVG writer).

and prints them next to the targets of issue 17: report <= 10 % of the analysis, warm re-audit with
the report < 5 % of the cold one. Inputs go to ``--inputs`` (default /tmp/driftwatch-report-bench) and
are kept between invocations (a stamp file).
"""
from __future__ import annotations

import argparse
import os
import shutil
import sys
import time
from pathlib import Path

for _v in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
    os.environ.setdefault(_v, "1")
HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE.parent))
sys.path.insert(0, str(HERE))

import make_inputs  # noqa: E402


def _cpu_all():
    import resource
    ch = resource.getrusage(resource.RUSAGE_CHILDREN)
    return time.process_time() + ch.ru_utime + ch.ru_stime


def make(root: Path, fmt: str, atoms: int, runs: int, steps: int) -> Path:
    """``runs`` run folders ``cell-NNNN`` (a name no code reads as a stage folder of its parent)."""
    camp = root / f"{fmt}-{atoms}-{runs}x{steps}"
    stamp = camp / ".made"
    want = f"{runs} {steps} {make_inputs.GENERATOR}\n"
    if stamp.is_file() and stamp.read_text() == want:
        return camp
    shutil.rmtree(camp, ignore_errors=True)
    for i in range(runs):
        make_inputs.write_run(camp / f"cell-{i:04d}", fmt, make_inputs.relaxation(atoms, steps, seed=i))
    stamp.write_text(want)
    return camp


def timed(fn):
    from driftwatch import symmetry
    symmetry.clear_cache()          # forked workers must not inherit this process's spectra
    t, c = time.perf_counter(), _cpu_all()
    out = fn()
    return out, time.perf_counter() - t, _cpu_all() - c


def show(what, value, unit, target="", ok=None, note=""):
    v = f"{value:.3g}" if isinstance(value, float) else str(value)
    status = "" if ok is None else ("PASS" if ok else "MISS")
    print(f"  {what:<56s} {v:>9s} {unit:<7s} {target:<10s} {status}", flush=True)
    if note:
        print(f"      {note}", flush=True)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    ap.add_argument("--runs", type=int, default=40)
    ap.add_argument("--steps", type=int, default=50)
    ap.add_argument("--atoms", type=int, default=48, choices=(4, 48, 192))
    ap.add_argument("--format", default="vasprun", choices=("vasprun", "outcar", "pwx"))
    ap.add_argument("--workers", type=int, default=os.cpu_count() or 1)
    ap.add_argument("--inputs", default="/tmp/driftwatch-report-bench")
    a = ap.parse_args(argv)

    from driftwatch.campaign import _build_report, audit
    from driftwatch.records import read_json
    work = Path(a.inputs)
    camp = make(work, a.format, a.atoms, a.runs, a.steps)
    print(f"[report] {a.runs} runs x {a.steps} steps x {a.atoms} atoms ({a.format}), "
          f"{a.workers} workers, load average {os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    kw = dict(workers=a.workers, progress="off", quiet=True)

    out1 = work / "out-analysis"
    shutil.rmtree(out1, ignore_errors=True)
    s1, t_an, c_an = timed(lambda: audit([camp], out1, report=False, **kw))
    assert s1["runs"] == a.runs and not s1["failed"], (s1["runs"], s1["failed"][:1])
    show("cold audit without the report (the analysis)", t_an, "s wall", "",
         None, f"CPU {c_an:.1f} s; {s1['runs']} runs, {s1['analysed']} analysed")

    for label, w in ((f"{a.workers} workers", a.workers), ("1 process", 1)):
        shutil.rmtree(out1 / "report", ignore_errors=True)
        _, t_rep, c_rep = timed(lambda: _build_report(out1, s1, workers=w, progress=False))
        n_pages = len(list((out1 / "report" / "runs").glob("*.html")))
        assert n_pages == a.runs
        if w == a.workers:
            share = t_rep / t_an
            show(f"report alone, {label} / analysis (wall)", share, "", "<= 0.10", share <= 0.10,
                 f"{t_rep:.2f} s wall, CPU {c_rep:.2f} s ({c_rep / c_an:.3f} of the analysis CPU, "
                 f"the fairer ratio on a shared machine); {n_pages} pages, "
                 f"{1000 * t_rep / n_pages:.1f} ms wall per page")
        else:
            show(f"report alone, {label}", t_rep, "s wall", "", None,
                 f"{1000 * t_rep / n_pages:.1f} ms per page; CPU {c_rep:.2f} s")

    out2 = work / "out-full"
    shutil.rmtree(out2, ignore_errors=True)
    s2, t_cold, c_cold = timed(lambda: audit([camp], out2, report=True, **kw))
    show("cold audit with the report", t_cold, "s wall", "", None,
         f"CPU {c_cold:.1f} s, {c_cold - c_an:+.1f} s beside the audit without it "
         f"({(c_cold - c_an) / c_an:+.1%}; CPU differences between two runs are noisy too)")
    s3, t_warm, _ = timed(lambda: audit([camp], out2, report=True, **kw))
    assert s3["cached"] == a.runs
    ratio = t_warm / t_cold
    show("warm re-audit with the report / cold with the report", ratio, "", "< 0.05", ratio < 0.05,
         f"{t_warm:.2f} s wall, {s3['cached']} runs cached, every page kept")
    _, t_warm0, _ = timed(lambda: audit([camp], out2, report=False, **kw))
    show("warm re-audit without the report", t_warm0, "s wall", "", None,
         f"{t_warm0 / t_cold:.3f} of the cold audit")

    import driftwatch.plots as dplots
    rec = read_json(next((out2 / "records").glob("*.json")))
    dplots.figures(rec)                                   # import matplotlib once, outside the timing
    t = time.perf_counter()
    for fig in dplots.figures(rec).values():
        fig.savefig(os.devnull, format="svg")
    t_mpl = time.perf_counter() - t
    show("reference: one page's plots as matplotlib Figures -> SVG", t_mpl, "s wall", "", None,
         f"{t_mpl * a.runs / t_an:.2f} of the analysis for {a.runs} pages (why the report draws its "
         f"own SVG from the same chart descriptions)")


if __name__ == "__main__":
    main()
