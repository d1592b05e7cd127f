"""Fuzzing with hypothesis: the lattice mathematics on hostile bases, every adapter on hostile bytes.

Contract under test (driftwatch/errors.py, docs/internals.md): on bad input the public functions
raise only the documented error types (``DriftwatchError`` subclasses: ``LatticeError`` for bases,
``InputError`` naming the file for files); on input they accept they return finite numbers that
obey the invariances of the published definitions (shared/math.md: the root invariant and the
root products are invariants of the lattice, so they do not change under a unimodular change of
basis, a rotation, or a mirror, and scale linearly with the lengths).

Seeds of the byte fuzzing are real files: the genuine VASP outputs ASE ships in its test data
(tests/data/vasp), real pw.x outputs (tests/data/qe, Quantum ESPRESSO from Debian), ASE
trajectories and extended XYZ written by ASE (example_runs/), an ASE database and a pymatgen
Structure list written by those libraries here.

Size: ``DRIFTWATCH_FUZZ_EXAMPLES`` (default 80) examples per lattice strategy, half that per file
strategy. One-off campaign (2026-12-01, DRIFTWATCH_FUZZ_EXAMPLES=10000, under ``ulimit -v 8000000``):
10^4 examples of each of the 7 lattice/geometry strategies and 5x10^3 of each of the 12 file
strategies; every bug it found is fixed (see the team report).
"""
from __future__ import annotations

import gzip
import json
import os
import shutil
import tempfile
import warnings
from pathlib import Path

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from driftwatch import geometry, lattice2d, lattice3d
from driftwatch.adapters import read_run
from driftwatch.errors import DriftwatchError, InputError, LatticeError

N = int(os.environ.get("DRIFTWATCH_FUZZ_EXAMPLES", "80"))
FUZZ = settings(max_examples=N, deadline=None, database=None, derandomize=False,
                suppress_health_check=list(HealthCheck))
FILE_FUZZ = settings(max_examples=max(10, N // 2), deadline=None, database=None,
                     suppress_health_check=list(HealthCheck))
EPS = np.finfo(float).eps
REPO = Path(__file__).resolve().parent.parent
DATA = REPO / "tests" / "data"
RUNS = REPO / "example_runs"

# ============================================================================ lattice strategies
finite = st.floats(allow_nan=False, allow_infinity=False, width=64)
anyfloat = st.floats(allow_nan=True, allow_infinity=True, width=64)
decades = st.integers(-8, 8)            # cells from 1e-8 Å to 1e8 Å (absurd lengths)


@st.composite
def unimodular(draw, dim, big=10**6):
    """A random integer matrix of determinant +-1, product of elementary moves with multipliers up
    to ``big`` (so entries reach ~big^k: a 'huge unimodular transform')."""
    m = np.eye(dim, dtype=object)
    for _ in range(draw(st.integers(1, 6))):
        i, j = draw(st.permutations(range(dim)))[:2]
        k = draw(st.integers(-big, big))
        m[i] = m[i] + k * m[j]
        if draw(st.booleans()):
            m[[i, j]] = m[[j, i]]
    m = np.array(m, dtype=float)
    if np.abs(m).max() > 2**52 or round(abs(np.linalg.det(m.astype(float)))) != 1:
        m = np.eye(dim)                   # keep it exactly representable
    return m


@st.composite
def basis2d(draw):
    """A reduced-ish 2D basis (rows) of any shape: lengths 0.5-20 Å times 10^k, angle from
    near-collinear (1e-9 rad) to obtuse, so near-degenerate and extremely skewed ones appear."""
    a = draw(st.floats(0.5, 20.0))
    b = a * draw(st.floats(0.2, 5.0))
    kind = draw(st.sampled_from(["any", "near-collinear", "near-right", "near-hex"]))
    if kind == "near-collinear":
        t = 10.0 ** draw(st.floats(-9, -1))
    elif kind == "near-right":
        t = np.pi / 2 + draw(st.sampled_from([-1, 1])) * 10.0 ** draw(st.floats(-12, -2))
        b = a * (1 + draw(st.floats(-1e-6, 1e-6)))
    elif kind == "near-hex":
        t = 2 * np.pi / 3 + 10.0 ** draw(st.floats(-12, -2))
        b = a
    else:
        t = draw(st.floats(0.05, np.pi - 0.05))
    s = 10.0 ** draw(decades)
    return s * np.array([[a, 0.0], [b * np.cos(t), b * np.sin(t)]])


@st.composite
def basis3d(draw):
    """A 3D basis (rows): a random cell 0.5-20 Å times 10^k, optionally squashed towards a plane
    (near-singular) or made nearly cubic/hexagonal (near a Bravais boundary)."""
    kind = draw(st.sampled_from(["any", "near-singular", "near-cubic", "near-hex"]))
    vals = draw(st.lists(st.floats(-1.0, 1.0), min_size=9, max_size=9))
    noise = np.array(vals).reshape(3, 3)
    if kind == "near-cubic":
        b = np.eye(3) * 4.0 + noise * 10.0 ** draw(st.floats(-12, -2))
    elif kind == "near-hex":
        b = np.array([[3.0, 0, 0], [-1.5, 1.5 * np.sqrt(3), 0], [0, 0, 5.0]])
        b = b + noise * 10.0 ** draw(st.floats(-12, -2))
    else:
        b = np.diag(draw(st.lists(st.floats(0.5, 20.0), min_size=3, max_size=3))) + 3 * noise
        if kind == "near-singular":
            b[2] = 0.6 * b[0] - 0.3 * b[1] + 10.0 ** draw(st.floats(-9, -1)) * b[2]
    return 10.0 ** draw(decades) * b


def _2d_or_error(b):
    try:
        return lattice2d.invariants(b)
    except LatticeError:
        return None


def _3d_or_error(b):
    try:
        return lattice3d.invariants(b)
    except LatticeError:
        return None


def _check2d(inv):
    p = inv["conorms"]
    assert np.all(np.isfinite(p)) and np.all(p >= 0) and np.all(np.diff(p) >= 0)
    r = inv["root_invariant"]
    assert np.all(np.isfinite(r)) and np.all(np.diff(r) >= 0)
    assert inv["sign"] in (-1, 0, 1)
    for group in ("distances", "deformation", "distances_projected"):
        for k, v in inv[group].items():
            assert np.isfinite(v) and v >= 0, (group, k, v)
    assert np.all(np.isfinite(inv["projected"]))


def _check3d(inv):
    for k in ("root_products", "fano_roots"):
        assert np.all(np.isfinite(inv[k])) and np.all(inv[k] >= 0), k
    for group in ("distance", "deformation", "systems"):
        for k, v in inv[group].items():
            assert np.isfinite(v) and v >= 0, (group, k, v)


# ------------------------------------------------------------------------------- 2D mathematics
@FUZZ
@given(st.lists(anyfloat, min_size=4, max_size=4))
def test_2d_any_four_floats_give_finite_invariants_or_lattice_error(vals):
    # arbitrary IEEE doubles (NaN, inf, subnormal, 1e308): a LatticeError or finite invariants
    inv = _2d_or_error(np.array(vals).reshape(2, 2))
    if inv is not None:
        _check2d(inv)


@FUZZ
@given(basis2d(), unimodular(2), st.floats(0, 2 * np.pi), st.booleans())
def test_2d_invariance_under_huge_unimodular_rotation_and_mirror(b, u, theta, mirror):
    # shared/math.md 1.1: the root invariant is an isometry invariant of the lattice, independent
    # of the basis; the sign flips under a mirror.  Tolerance: the rounding the transformed input
    # itself carries, eps * |entries of U B| (common practice for floating-point invariance tests).
    inv = _2d_or_error(b)
    ub = u @ b
    R = np.array([[np.cos(theta), np.sin(theta)], [-np.sin(theta), np.cos(theta)]])
    ub = ub @ R
    if mirror:
        ub = ub * np.array([1.0, -1.0])
    inv2 = _2d_or_error(ub)
    if inv is None or inv2 is None:
        # refused (LatticeError) only under the documented criterion: |det| <= 1e-12 |a| |b|
        # (lattice2d._COLLINEAR); a huge transform can push a good basis there
        if inv is not None:
            n = np.linalg.norm(ub, axis=1)
            assert abs(np.linalg.det(ub)) <= 2e-12 * n[0] * n[1]
        return
    _check2d(inv)
    _check2d(inv2)
    scale = np.abs(b).max()
    v = np.sqrt(inv["conorms"].max()) * 2
    m = max(np.abs(ub).max(), scale)
    # the reduced vectors are C @ (rows), |C| <= 2 |v| m / area: rounding of the rows reaches the
    # conorms multiplied by that condition number
    cond = 2 * v * m / abs(np.linalg.det(b))
    tol_p = 64 * EPS * cond * m * v + 1e-12 * scale**2
    assert np.allclose(inv["conorms"], inv2["conorms"], rtol=0, atol=tol_p)
    # root space: sqrt is Hölder-1/2 at 0, so the root tolerance is sqrt of the conorm one
    assert np.allclose(inv["root_invariant"], inv2["root_invariant"], rtol=0,
                       atol=np.sqrt(2 * tol_p))
    for k in ("op", "oc", "tp", "hp", "mirror"):
        assert abs(inv["distances"][k] - inv2["distances"][k]) <= 2 * np.sqrt(2 * tol_p)
    if inv["distances"]["mirror"] > 4 * np.sqrt(2 * tol_p):   # clearly chiral: a mirror flips it
        assert inv2["sign"] == (-inv["sign"] if mirror else inv["sign"])


@FUZZ
@given(basis2d(), st.integers(-60, 60), st.floats(1e-3, 1e3))
def test_2d_scale_covariance(b, k, s):
    # shared/math.md 1.1: RI(s B) = s RI(B) (lengths in Å); powers of two are exact in floating point
    inv = _2d_or_error(b)
    if inv is None:
        return
    two = _2d_or_error(b * 2.0**k)
    assert two is not None
    assert np.array_equal(two["root_invariant"], inv["root_invariant"] * 2.0**k)
    assert two["sign"] == inv["sign"]
    assert np.allclose(two["projected"], inv["projected"], rtol=0, atol=1e-12)
    any_ = _2d_or_error(b * s)
    assert any_ is not None
    # b * s is rounded: that rounding reaches the conorms times the condition number of the
    # reduction (2 |v| m / area), as in the invariance test
    m, v = s * np.abs(b).max(), 2 * s * np.sqrt(inv["conorms"].max())
    cond = 2 * v * m / abs(np.linalg.det(b * s))
    tol_p = 64 * EPS * cond * m * v + 1e-12 * v * v
    assert np.allclose(any_["conorms"], s * s * inv["conorms"], rtol=0, atol=tol_p)
    assert np.allclose(any_["root_invariant"], s * inv["root_invariant"], rtol=0,
                       atol=np.sqrt(2 * tol_p))


# ------------------------------------------------------------------------------- 3D mathematics
@FUZZ
@given(st.lists(anyfloat, min_size=9, max_size=9))
def test_3d_any_nine_floats_give_finite_invariants_or_lattice_error(vals):
    inv = _3d_or_error(np.array(vals).reshape(3, 3))
    if inv is not None:
        _check3d(inv)


def test_vectors_longer_than_the_double_range_are_a_lattice_error_without_warnings():
    # a hypothesis draw found it: entries near the largest double (1.7e308) make a length beyond
    # the double range; that is an out-of-range length (LatticeError), and no RuntimeWarning leaks
    big = np.finfo(float).max
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        with pytest.raises(LatticeError, match="has length inf"):
            lattice3d.invariants(np.array([[big, big, 0.0], [0.0, 1.0, 0.0], [0.0, 0.0, 1.0]]))
        with pytest.raises(LatticeError, match="has length inf"):
            lattice2d.invariants(np.array([[big, big], [0.0, 1.0]]))


@FUZZ
@given(basis3d(), unimodular(3, big=1000), st.booleans())
def test_3d_invariance_under_huge_unimodular_and_mirror(b, u, mirror):
    # shared/math.md 2: the Fano 7-vector of root products is a lattice invariant (any basis, any
    # orientation).  Tolerance from the rounding of U B, as in 2D.
    inv = _3d_or_error(b)
    ub = u @ b
    if mirror:
        ub = ub * np.array([1.0, 1.0, -1.0])
    inv2 = _3d_or_error(ub)
    if inv is None or inv2 is None:
        if inv is not None:       # documented criterion: |det| <= 1e-12 prod |b_i|
            assert abs(np.linalg.det(ub)) <= 2e-12 * np.prod(np.linalg.norm(ub, axis=1))
        return
    _check3d(inv)
    _check3d(inv2)
    p1 = lattice3d.fano_conorms(b)
    p2 = lattice3d.fano_conorms(ub)
    m = max(np.abs(ub).max(), np.abs(b).max())
    v = 2 * np.sqrt(p1.max())
    cond = 3 * v * m * m / abs(np.linalg.det(b))        # |C| of the reduction, as in 2D
    tol_p = 256 * EPS * cond * m * v + 1e-12 * np.abs(b).max() ** 2
    assert np.allclose(np.sort(p1), np.sort(p2), rtol=0, atol=tol_p)
    for k in lattice3d.TYPES:
        assert abs(inv["distance"][k] - inv2["distance"][k]) <= 4 * np.sqrt(tol_p), k


@FUZZ
@given(basis3d(), st.integers(-60, 60))
def test_3d_scale_covariance(b, k):
    inv = _3d_or_error(b)
    if inv is None:
        return
    two = _3d_or_error(b * 2.0**k)
    assert two is not None
    assert np.allclose(two["fano_roots"], inv["fano_roots"] * 2.0**k, rtol=1e-12,
                       atol=1e-12 * 2.0**k * inv["fano_roots"].max())
    for t in lattice3d.TYPES:
        assert np.isclose(two["deformation"][t], inv["deformation"][t] * 2.0**k, rtol=1e-9,
                          atol=1e-9 * 2.0**k * inv["fano_roots"].max())


@FUZZ
@given(st.lists(anyfloat, min_size=9, max_size=9), st.lists(anyfloat, min_size=6, max_size=6),
       st.sampled_from([[True] * 3, [True, True, False], [False, True, True]]))
def test_geometry_on_any_cell_gives_a_decision_or_documented_error(cell, pos, pbc):
    # geometry.classify + inplane_bases: a decision or a DriftwatchError, never a crash or NaN
    cell = np.array(cell).reshape(3, 3)
    pos = np.array(pos).reshape(2, 3)
    try:
        geo = geometry.classify(cell, pbc, pos)
        if geo.dimension == 2:
            b = geometry.inplane_bases(cell, geo.vacuum_axis)
            assert np.all(np.isfinite(b))
            assert np.all(np.isfinite(geo.viewing_side))
    except DriftwatchError:
        pass


# ============================================================================ file-bytes fuzzing
def _seed_files() -> dict[str, tuple[str, bytes]]:
    """format -> (file name, bytes of a real file of that format)."""
    import ase.db
    import ase.io
    from pymatgen.io.ase import AseAtomsAdaptor
    seeds = {
        "vasp-xml": ("vasprun.xml", (DATA / "vasp" / "vasprun_pstress.xml").read_bytes()),
        "vasp-out": ("OUTCAR", gzip.decompress((DATA / "vasp" / "OUTCAR_example_1.gz")
                                               .read_bytes())),
        "espresso-out": ("pw.out", (DATA / "qe" / "relax_atoms_to_sites" / "pw.out").read_bytes()),
        "traj": ("run.traj", (RUNS / "L06_emt_bfgs.traj").read_bytes()),
        "extxyz": ("run.extxyz", (RUNS / "L08_emt_fire_loose.extxyz").read_bytes()),
    }
    frames = ase.io.read(RUNS / "L06_emt_bfgs.traj", ":4")
    with tempfile.TemporaryDirectory() as tmp:
        tmp = Path(tmp)
        ase.io.write(tmp / "POSCAR", frames[0], format="vasp", direct=True)
        seeds["vasp-poscar"] = ("POSCAR", (tmp / "POSCAR").read_bytes())
        for name, fmt in (("run.db", "ase-db"), ("run.json", "ase-json-db")):
            with ase.db.connect(tmp / name, use_lock_file=False) as db:
                for a in frames:
                    db.write(a)
            seeds[fmt] = (name, (tmp / name).read_bytes())
        structs = [AseAtomsAdaptor.get_structure(a).as_dict() for a in frames]
        seeds["pymatgen-json"] = ("structures.json", json.dumps(structs).encode())
        import sys
        sys.path.insert(0, str(REPO / "tests"))
        import vasp_gen
        traj = vasp_gen.drifting_layer(4)
        vasp_gen.write_xdatcar(tmp / "XDATCAR", traj)
        seeds["vasp-xdatcar"] = ("XDATCAR", (tmp / "XDATCAR").read_bytes())
    seeds["vasp-out.gz"] = ("OUTCAR.gz", (DATA / "vasp" / "OUTCAR_example_1.gz").read_bytes())
    return seeds


SEEDS = _seed_files()


@pytest.fixture(scope="module")
def fuzzdir():
    d = Path(tempfile.mkdtemp(prefix="dw-fuzz-"))
    yield d
    shutil.rmtree(d, ignore_errors=True)


@st.composite
def mutated(draw, data: bytes):
    """Realistic damage to a real file: truncation, flipped bytes, an inserted or deleted span,
    a duplicated span (a file written twice), NaN/inf/huge numbers put in place of digits."""
    buf = bytearray(data)
    for _ in range(draw(st.integers(1, 4))):
        op = draw(st.sampled_from(["cut", "flip", "insert", "delete", "dup", "number", "nul"]))
        n = len(buf)
        i = draw(st.integers(0, max(0, n - 1)))
        if op == "cut":
            del buf[i:]
        elif op == "flip" and n:
            for _ in range(draw(st.integers(1, 16))):
                j = draw(st.integers(0, n - 1))
                buf[j] = draw(st.integers(0, 255))
        elif op == "insert":
            buf[i:i] = draw(st.binary(min_size=1, max_size=64))
        elif op == "delete":
            del buf[i:i + draw(st.integers(1, 4096))]
        elif op == "dup":
            j = min(n, i + draw(st.integers(1, 8192)))
            buf[j:j] = buf[i:j]
        elif op == "number":
            digits = [k for k in range(i, min(n, i + 4096)) if 48 <= buf[k] <= 57]
            if digits:
                k = digits[0]
                buf[k:k + 1] = draw(st.sampled_from([b"nan", b"inf", b"-inf", b"1e308", b"1e-320",
                                                     b"NaN", b"9" * 40, b"*****", b"-"]))
        elif op == "nul":
            buf[i:i] = b"\0" * draw(st.integers(1, 512))
    return bytes(buf)


def _read_checked(path: Path, fmt):
    """read_run + the lattice table: only documented errors; accepted data is finite."""
    try:
        run = read_run(path, format=fmt)
    except InputError as exc:
        assert exc.path and str(path.parent) in str(exc), f"error does not name the file: {exc}"
        assert "\n" not in str(exc).strip(), f"error is not one line: {exc!r}"
        # a damaged count must not make a reader allocate without bound (run the large campaign
        # under `ulimit -v` so that such a blow-up shows here instead of as an OOM kill)
        # (.traj still can: ASE's ULM reader allocates damaged array shapes before checking
        # them; the header counts are checked, the per-array shapes not yet -- see the report)
        assert "MemoryError" not in str(exc) or path.suffix == ".traj", exc
        return
    assert np.all(np.isfinite(run.cells)) and np.all(np.isfinite(run.positions))
    assert run.cells.shape[0] >= 1 and run.positions.shape[1] == len(run.numbers) >= 1
    try:
        geo = geometry.classify(run.cells, run.pbc, run.positions)
        from driftwatch.track import lattice_table
        table = lattice_table(run, geo)
    except DriftwatchError:
        return
    for group in ("distance", "deformation"):
        for k, v in table[group].items():
            assert np.all(np.isfinite(v)), (group, k)


FORMATS = sorted(SEEDS)


@pytest.mark.parametrize("fmt", FORMATS)
def test_seed_files_are_read(fmt, fuzzdir):
    # the unmutated real files are read (the fuzzing starts from valid inputs of every adapter)
    name, data = SEEDS[fmt]
    p = fuzzdir / f"seed-{fmt}" / name
    p.parent.mkdir(exist_ok=True)
    p.write_bytes(data)
    run = read_run(p, format=fmt.replace(".gz", ""))
    assert len(run.cells) >= 1


@pytest.mark.parametrize("fmt", FORMATS)
def test_adapters_on_damaged_real_files_raise_only_input_errors(fmt, fuzzdir):
    name, data = SEEDS[fmt]
    folder = fuzzdir / fmt
    folder.mkdir(exist_ok=True)
    path = folder / name
    adapter = fmt.replace(".gz", "")

    @FILE_FUZZ
    @given(mutated(data), st.booleans())
    def run(blob, named_format):
        path.write_bytes(blob)
        _read_checked(path, adapter if named_format else None)

    run()


@FILE_FUZZ
@given(st.binary(max_size=4096), st.sampled_from(sorted({n for n, _ in SEEDS.values()})))
def test_random_bytes_under_every_trusted_name(blob, name):
    d = Path(tempfile.mkdtemp(prefix="dw-fuzz-bytes-"))
    try:
        p = d / name
        p.write_bytes(blob)
        _read_checked(p, None)
    finally:
        shutil.rmtree(d, ignore_errors=True)


def test_a_poscar_whose_counts_line_was_damaged_into_a_position_is_refused_in_one_line(tmp_path):
    """Found by the fuzz test above (seed 120): its POSCAR seed (four species) with its counts
    line replaced by a position line whose first number is 4999999999999999. ASE's POSCAR reader
    takes leading integers as atom counts and allocated for them (MemoryError); counts beyond the
    lines the file holds are refused first, in one line naming the file."""
    blob = (b"Ni Cu Ag Pt\n 1.0\n 5.16 0.0 0.0\n 2.727 4.498 0.0\n 0.0 0.0 14.0\n Ni Cu Ag Pt\n"
            b"4999999999999999  0.0000000000000000  0.5000000000000000\n 0.0 0.5 0.5\n"
            b" 0.5 0.5 0.5\n")
    path = tmp_path / "POSCAR"
    path.write_bytes(blob)
    with pytest.raises(InputError, match="atom counts .* out of range") as e:
        read_run(path)
    assert str(path) in str(e.value) and "\n" not in str(e.value)


def test_a_singular_cell_after_a_jump_is_left_to_the_cell_check():
    """Found by the damaged-file fuzz above (an extended XYZ): a frame whose cell jumped to one
    that LAPACK finds singular had raised numpy's LinAlgError from the box-flip re-basing; the
    re-basing leaves it alone (the reader's cell check, or the analysis, names the frame)."""
    from driftwatch.adapters.run import continuous_basis
    cells = np.array([np.eye(3) * 3.0, np.zeros((3, 3)), np.eye(3) * 3.0])
    assert continuous_basis(cells.copy(), np.array([True, True, True])) == []
