"""The bounded readers' limits, measured: the largest input read, the longest line, peak memory.

    python bench/limits.py                   # a 192-atom, 2,000-step OUTCAR (58 MB): ~1 minute
    python bench/limits.py --steps 36000 --packed gz    # ~1 GB: ~5 minutes, ~1.1 GB of disk

Each measurement runs ``read_run`` in a fresh process and reports its wall time and peak RSS
(``VmHWM`` of the process: the interpreter with numpy and ASE included; "baseline" is a one-step
genuine OUTCAR). The OUTCAR is written by ``bench/make_inputs.py`` (invented relaxation, padded with
electronic-iteration blocks of ASE's genuine OUTCAR_example_1), then read plain, gzip'ed and xz'ed;
the issue's decompression bombs and a 64 MiB one-line file are read too (refused: see
``driftwatch/adapters/_io.py`` for the limits). Nothing here is a test: the numbers go to README.md.
"""
from __future__ import annotations

import argparse
import bz2
import gzip
import json
import lzma
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
sys.path.insert(0, str(HERE))

CHILD = """
import json, sys, time
from driftwatch.adapters import read_run
from driftwatch.errors import InputError
t0 = time.perf_counter()
try:
    run = read_run(sys.argv[1])
    got = {"frames": len(run.cells), "atoms": len(run.numbers)}
except InputError as exc:
    got = {"refused": str(exc).split(": ", 1)[-1][:90]}
got["s"] = round(time.perf_counter() - t0, 2)
got["peak_rss_MB"] = round(next(int(line.split()[1]) for line in open("/proc/self/status")
                                if line.startswith("VmHWM:")) / 1024, 1)
print(json.dumps(got))
"""


def measure(path: Path) -> dict:
    r = subprocess.run([sys.executable, "-c", CHILD, str(path)], capture_output=True, text=True,
                       check=True)
    return json.loads(r.stdout)


def main(argv=None) -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--steps", type=int, default=2000)
    ap.add_argument("--atoms", type=int, default=192, choices=(4, 48, 192))
    ap.add_argument("--work", default=None, help="folder for the generated files (default: temp)")
    ap.add_argument("--packed", default="gz,xz", help="compressed copies to read (gz, xz)")
    a = ap.parse_args(argv)
    from make_inputs import relaxation, write_run
    work = Path(a.work or tempfile.mkdtemp(prefix="dw-limits-"))
    rows = []

    def show(what, path):
        got = measure(path)
        size = path.stat().st_size
        rows.append({"input": what, "bytes": size, **got})
        print(json.dumps(rows[-1]), flush=True)

    genuine = work / "baseline" / "OUTCAR"
    genuine.parent.mkdir(parents=True, exist_ok=True)
    genuine.write_bytes(gzip.decompress((HERE.parent / "tests/data/vasp/OUTCAR_example_1.gz")
                                        .read_bytes()))
    show("baseline: genuine one-step OUTCAR", genuine)
    t0 = time.perf_counter()
    plain = write_run(work / "big", "outcar", relaxation(a.atoms, a.steps, seed=19))
    print(f"# generated {plain} in {time.perf_counter() - t0:.0f} s", flush=True)
    show(f"OUTCAR, {a.atoms} atoms, {a.steps} steps", plain)
    for ext, opener in ((".gz", gzip.open), (".xz", lzma.open)):
        if ext[1:] not in a.packed.split(","):
            continue
        packed = work / f"packed{ext}" / f"OUTCAR{ext}"
        packed.parent.mkdir(exist_ok=True)
        with open(plain, "rb") as src, opener(packed, "wb") as dst:
            shutil.copyfileobj(src, dst, 1 << 20)
        show(f"the same, {ext}", packed)
    bombs = work / "bombs"
    bombs.mkdir(exist_ok=True)
    zeros = b"\0" * (64 << 20)
    for name, blob in (("OUTCAR.gz", gzip.compress(zeros, 9)), ("pw.out.xz", lzma.compress(zeros)),
                       ("OUTCAR.bz2", bz2.compress(zeros[: 45 << 20], 9)),
                       ("blank_OUTCAR.bz2", bz2.compress(b"\n" * (45 << 20), 9) * 100)):
        (bombs / name).write_bytes(blob)
        show(f"bomb {name}", bombs / name)
    line = work / "line" / "OUTCAR"
    line.parent.mkdir(exist_ok=True)
    line.write_bytes(b" vasp.5.4.4 invented\n" + b"0" * (64 << 20) + b"\n")
    show("plain OUTCAR with a 64 MiB line", line)
    print(json.dumps(rows, indent=1))
    if a.work is None:
        shutil.rmtree(work, ignore_errors=True)


if __name__ == "__main__":
    main()
