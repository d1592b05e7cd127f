"""Calibrate driftwatch's deformation measure against spglib's lattice-only verdict.

    python bench/calibrate_deformation.py                 # 2D and 3D, 60 cells per type (~4 min)
    python bench/calibrate_deformation.py --samples 200 --seed 3 --dims 3
    python bench/calibrate_deformation.py --samples 120 --save cells.npz     # keep the cells, then
    python bench/calibrate_deformation.py --load cells.npz --driftwatch ../old-checkout

For every Bravais type T (2D: op oc tp hp and the ``mirror`` key; 3D: the 13 types mP ... cF):

1. a random cell of type T is built from conventional parameters (International Tables metric
   conditions: a = b for tetragonal, gamma = 120 deg for hexagonal, ...) and the usual centring
   matrices; its type is confirmed by spglib on a one-atom cell (symprec 1e-5 Å), and it must still
   be T at a symprec of 2 % of its shortest vector (so it is not accidentally close to a higher type);
   the aspect ratio (longest / shortest vector of spglib's Niggli-reduced cell; 2D: of the
   Lagrange-reduced basis) is drawn up to ``--max-aspect`` (default 4);
2. it is strained by a random symmetric strain of norm s (Frobenius), s log-uniform in 1e-5 .. 1e-2;
3. the critical symprec is found by bisection in log symprec: the smallest symprec at which spglib's
   lattice-only verdict (the Bravais type of the one-atom cell; 2D: a slab with a 40 Å perpendicular
   axis) is T or a type that specialises T;
4. R = deformation[T] / critical symprec, for metric "l2" and "linf".

Cells whose critical symprec is below 3e-6 x their shortest vector are skipped and counted:
spglib's lattice test ignores angle changes below 1e-6 rad whatever symprec is (``ANGLE_CUTOFF``).

The script prints min / median / max of R per type and metric, and the aspect range covered.
``R = 1`` means "deformation = the symprec spglib needs to call the type"; the target band is
0.5 <= R <= 2.  The sampling and the bisection here are also what ``tests/test_lattice2d.py`` and
``tests/test_lattice3d.py`` use on a small seeded sample.
"""
from __future__ import annotations

import argparse
import os
import sys
from pathlib import Path

os.environ.setdefault("SPGLIB_WARNING", "OFF")  # spglib's C warnings at large symprec
import numpy as np  # noqa: E402
import spglib  # noqa: E402

ROOT = Path(__file__).resolve().parent.parent

TYPES3 = ("mP", "mS", "oP", "oS", "oI", "oF", "tP", "tI", "hR", "hP", "cP", "cI", "cF")
TYPES2 = ("op", "oc", "tp", "hp", "mirror")
STRAIN = (1e-5, 1e-2)
# International Tables centring: primitive vectors (rows) in units of the conventional ones
CENTRING = {
    "P": np.eye(3),
    "I": 0.5 * np.array([[-1, 1, 1], [1, -1, 1], [1, 1, -1.0]]),
    "F": 0.5 * np.array([[0, 1, 1], [1, 0, 1], [1, 1, 0.0]]),
    "S": 0.5 * np.array([[1, -1, 0], [1, 1, 0], [0, 0, 2.0]]),   # C-centred
    "R": np.array([[2, 1, 1], [-1, 1, 1], [-1, -2, 1.0]]) / 3,   # obverse, hexagonal axes
}
# direct containment of Bravais types (International Tables); closure gives "T or finer"
SPECIALISES3 = {
    "cP": ("tP", "hR"), "cI": ("tI", "hR"), "cF": ("tI", "hR"), "tP": ("oP", "oS"),
    "tI": ("oI", "oF"), "hP": ("oS",), "hR": ("mS",), "oP": ("mP",), "oS": ("mP", "mS"),
    "oI": ("mS",), "oF": ("mS",), "mP": ("aP",), "mS": ("aP",), "aP": (),
}
SPECIALISES2 = {"tp": ("op", "oc"), "hp": ("oc",), "op": ("mp",), "oc": ("mp",), "mp": ()}
SLAB_C = 40.0  # Å, perpendicular axis of the 2D slab cell


def closure(t, graph):
    """t and every type that t specialises (all types containing t)."""
    out, todo = set(), [t]
    while todo:
        k = todo.pop()
        if k not in out:
            out.add(k)
            todo.extend(graph[k])
    return out


# ----------------------------------------------------------------------------- spglib verdicts

def spglib_type3(cell, symprec):
    """Pearson symbol of the lattice by spglib on a one-atom cell (None if spglib fails)."""
    sym = spglib.get_spacegroup((np.asarray(cell, float), [[0, 0, 0]], [1]), symprec=symprec)
    if not sym:
        return None
    num = int(sym.split("(")[1].rstrip(")"))
    system = ("a" if num <= 2 else "m" if num <= 15 else "o" if num <= 74 else
              "t" if num <= 142 else "h" if num <= 194 else "c")
    c = sym[0]
    return system + ("S" if c in "ABC" else c)


def spglib_type2(basis, symprec):
    """2D Bravais type by spglib on a one-atom slab cell (perpendicular axis 40 Å)."""
    cell = np.zeros((3, 3))
    cell[:2, :2] = basis
    cell[2, 2] = SLAB_C
    t = spglib_type3(cell, symprec)
    if t is None:
        return None
    return {"m": "mp", "o": "op" if t[1] == "P" else "oc", "t": "tp", "h": "hp"}.get(t[0], "?" + t)


def _accepts(dim, target):
    """Verdict test: the verdict is ``target`` or a type that specialises it."""
    if dim == 2:
        if target == "mirror":
            return lambda v: v in ("op", "oc", "tp", "hp")
        return lambda v: v is not None and target in closure(v, SPECIALISES2)
    return lambda v: v is not None and target in closure(v, SPECIALISES3)


def critical_symprec(cell, target, steps=32):
    """Smallest symprec (Å) at which spglib's lattice verdict is ``target`` or finer.

    Bisection in log symprec between 1e-9 and 0.2 x the shortest lattice vector (0.1, 0.05 x if
    spglib fails up there); raises if the verdict is already ``target`` at the bottom or never at
    the top."""
    cell = np.asarray(cell, float)
    dim = cell.shape[0]
    ok = _accepts(dim, target)
    kind = spglib_type2 if dim == 2 else spglib_type3
    short = shortest(cell)
    lo = np.log(1e-9 * short)
    if ok(kind(cell, np.exp(lo))):
        raise RuntimeError(f"{target} already at symprec {np.exp(lo):.3g}: {cell.tolist()}")
    for f in (0.2, 0.1, 0.05):
        hi = np.log(f * short)
        if ok(kind(cell, np.exp(hi))):
            break
    else:
        raise RuntimeError(f"never {target} up to symprec {0.2 * short:.3g}: {cell.tolist()}")
    for _ in range(steps):
        mid = (lo + hi) / 2
        lo, hi = (lo, mid) if ok(kind(cell, np.exp(mid))) else (mid, hi)
    return float(np.exp(hi))


def shortest(cell):
    """Length (Å) of the shortest lattice vector (Lagrange / Niggli reduced basis)."""
    cell = np.asarray(cell, float)
    red = reduced2(cell) if cell.shape[0] == 2 else spglib.niggli_reduce(cell)
    return float(np.linalg.norm(red, axis=1).min())


# ----------------------------------------------------------------------------- random cells

def aspect3(cell):
    """Longest / shortest vector of spglib's Niggli-reduced cell."""
    n = np.linalg.norm(spglib.niggli_reduce(np.asarray(cell, float)), axis=1)
    return float(n.max() / n.min())


def reduced2(basis):
    """Lagrange-reduced 2D basis (rows)."""
    a, b = np.array(basis, float)
    while True:
        if a @ a > b @ b:
            a, b = b, a
        c = b - np.rint(a @ b / (a @ a)) * a
        if c @ c >= (1 - 1e-12) * (b @ b):   # no strict progress (ties of hexagonal cells)
            return np.array([a, b])
        b = c


def aspect2(basis):
    """Longest / shortest vector of the Lagrange-reduced 2D basis."""
    n = np.linalg.norm(reduced2(basis), axis=1)
    return float(n.max() / n.min())


def random_rotation(rng, dim):
    q, r = np.linalg.qr(rng.normal(size=(dim, dim)))
    q = q * np.sign(np.diag(r))
    return q


def _conventional3(kind, rng, top):
    """Conventional cell (rows) of a random lattice of type ``kind``; length ratios up to ``top``."""
    s = kind[0]
    a = rng.uniform(2.5, 6.0)
    ratio = lambda: np.exp(rng.uniform(-np.log(top), np.log(top)))
    if s == "c":
        return a * np.eye(3)
    if s == "t":
        return np.diag([a, a, a * ratio()])
    if s == "o":
        return np.diag([a, a * ratio(), a * ratio()])
    if s == "h":
        c = a * ratio()
        return np.array([[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, c]])
    # monoclinic, unique axis b
    b, c = a * ratio(), a * ratio()
    beta = np.radians(rng.uniform(91.0, 135.0))
    return np.array([[a, 0, 0], [0, b, 0], [c * np.cos(beta), 0, c * np.sin(beta)]])


def random_cell3(kind, rng, aspect=(1.0, 4.0), tries=5000):
    """Primitive cell (rows, Å) of a random lattice of Bravais type ``kind``, randomly rotated.

    Confirmed by spglib (one-atom cell): the type at symprec 1e-5 Å and still the type at 2 % of
    the shortest vector; the Niggli aspect ratio lies in ``aspect``."""
    for _ in range(tries):
        conv = _conventional3(kind, rng, 1.25 * aspect[1])
        cell = CENTRING[kind[1]] @ conv
        asp = aspect3(cell)
        if not aspect[0] <= asp <= aspect[1]:
            continue
        if spglib_type3(cell, 1e-5) != kind or spglib_type3(cell, 0.02 * shortest(cell)) != kind:
            continue
        return cell @ random_rotation(rng, 3).T
    raise RuntimeError(f"no {kind} cell with aspect in {aspect}")


def random_cell2(kind, rng, aspect=(1.0, 4.0), tries=5000):
    """2D basis (rows, Å) of a random lattice of type ``kind`` (``mirror``: op or oc), rotated.

    Confirmed by spglib (one-atom slab cell) at symprec 1e-5 Å and at 2 % of the shortest vector."""
    top = 1.25 * aspect[1]
    for _ in range(tries):
        k = kind if kind != "mirror" else ("op", "oc")[rng.integers(2)]
        a = rng.uniform(2.5, 6.0)
        if k == "tp":
            basis = a * np.eye(2)
        elif k == "hp":
            basis = a * np.array([[1, 0], [0.5, np.sqrt(3) / 2]])
        elif k == "op":
            basis = np.diag([a, a * np.exp(rng.uniform(0, np.log(top)))])
        else:  # centred rectangular: conventional a x b, primitive (a/2, +-b/2)
            b = a * np.exp(rng.uniform(-np.log(2 * top), np.log(2 * top)))
            basis = np.array([[a / 2, b / 2], [a / 2, -b / 2]])
        asp = aspect2(basis)
        if not aspect[0] <= asp <= aspect[1]:
            continue
        if spglib_type2(basis, 1e-5) != k or spglib_type2(basis, 0.02 * shortest(basis)) != k:
            continue
        return basis @ random_rotation(rng, 2).T
    raise RuntimeError(f"no {kind} cell with aspect in {aspect}")


def random_strain(rng, dim, size=STRAIN):
    """Random symmetric strain (dim, dim), Frobenius norm log-uniform in ``size``."""
    e = rng.normal(size=(dim, dim))
    e = e + e.T
    return e * np.exp(rng.uniform(*np.log(size))) / np.linalg.norm(e)


ANGLE_CUTOFF = 3e-6
"""spglib's lattice test ignores angle changes with sin^2 <= 1e-12 (|dtheta| <= 1e-6 rad,
SIN_DTHETA2_CUTOFF in its symmetry.c) whatever symprec is; strained cells whose critical symprec
is below ANGLE_CUTOFF x the shortest vector are in that regime and are skipped (and counted)."""


def sample(dim, kind, n, rng, aspect=(1.0, 4.0)):
    """n strained cells of ``kind``: (cells (n, d, d), critical symprecs (n,), aspects (n,), skipped).

    ``skipped`` counts strained cells left out because spglib's angle cutoff decides them."""
    make = random_cell3 if dim == 3 else random_cell2
    asp_of = aspect3 if dim == 3 else aspect2
    cells, crit, asp, skipped = [], [], [], 0
    while len(cells) < n:
        cell = make(kind, rng, aspect)
        strained = cell @ (np.eye(dim) + random_strain(rng, dim))
        c = critical_symprec(strained, kind)
        if c < ANGLE_CUTOFF * shortest(strained):
            skipped += 1
            continue
        cells.append(strained)
        crit.append(c)
        asp.append(asp_of(cell))
    return np.array(cells), np.array(crit), np.array(asp), skipped


# ----------------------------------------------------------------------------- report

def ratios(dim, kind, cells, crit, metric):
    from driftwatch import lattice2d, lattice3d
    mod = lattice3d if dim == 3 else lattice2d
    return mod.deformation(cells, metric)[kind] / crit


def main(argv=None):
    p = argparse.ArgumentParser(description=__doc__.split("\n\n")[0])
    p.add_argument("--samples", type=int, default=60, help="strained cells per type")
    p.add_argument("--seed", type=int, default=2024)
    p.add_argument("--dims", default="2,3")
    p.add_argument("--max-aspect", type=float, default=4.0)
    p.add_argument("--driftwatch", type=Path, default=ROOT,
                   help="folder holding the driftwatch package to calibrate (default: this checkout)")
    p.add_argument("--save", type=Path, help="also write the strained cells, critical symprecs and "
                   "aspects (.npz), to compare another version of the measure on the same cells")
    p.add_argument("--load", type=Path, help="re-use the cells of a --save file instead of sampling "
                   "(no spglib calls; e.g. with --driftwatch pointing at an older checkout)")
    a = p.parse_args(argv)
    sys.path.insert(0, str(a.driftwatch))
    import driftwatch
    print(f"driftwatch from {Path(driftwatch.__file__).parent}; spglib {spglib.__version__}; "
          + (f"cells of {a.load}" if a.load else
             f"{a.samples} cells per type; strain norm {STRAIN[0]:g}..{STRAIN[1]:g}; seed {a.seed}"))
    print(f"{'type':7s} {'aspect':>10s}  {'R l2: min':>9s} {'median':>7s} {'max':>6s}"
          f"   {'R linf: min':>11s} {'median':>7s} {'max':>6s}  skipped")
    everything = {"l2": [], "linf": []}
    saved = {}
    for dim in (int(d) for d in a.dims.split(",")):
        types = TYPES2 if dim == 2 else TYPES3
        for kind in types:
            key = f"{dim}{kind}"
            if a.load:
                with np.load(a.load) as f:
                    cells, crit, asp, skipped = (f[key + "_cells"], f[key + "_crit"], f[key + "_asp"],
                                                 int(f[key + "_skipped"]))
            else:
                rng = np.random.default_rng([a.seed, dim, types.index(kind)])
                cells, crit, asp, skipped = sample(dim, kind, a.samples, rng, (1.0, a.max_aspect))
            saved.update({key + "_cells": cells, key + "_crit": crit, key + "_asp": asp,
                          key + "_skipped": skipped})
            cols = []
            for metric in ("l2", "linf"):
                r = ratios(dim, kind, cells, crit, metric)
                everything[metric].append(r)
                cols.append(f"{r.min():9.3f} {np.median(r):7.3f} {r.max():6.3f}")
            print(f"{kind:7s} {asp.min():4.2f}-{asp.max():4.2f}  {cols[0]}   {cols[1]:>26s}  {skipped}",
                  flush=True)
    if a.save:
        np.savez(a.save, **saved)
    for metric, rs in everything.items():
        r = np.concatenate(rs)
        out = int(((r < 0.5) | (r > 2.0)).sum())
        print(f"all types, {metric}: R {r.min():.3f} .. {r.max():.3f} (median {np.median(r):.3f}); "
              f"{out} of {r.size} cells outside 0.5 .. 2")


if __name__ == "__main__":
    main()
