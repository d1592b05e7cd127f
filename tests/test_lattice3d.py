"""Tests of driftwatch.lattice3d against external references.

Sources named beside each check:
* shared/math.md section 4 check values (brute-force enumeration and numerical
  minimisation done for the team reference);
* tests/brute3d.py: independent brute force (lattice-vector enumeration in a
  rigorous coefficient box, vonorms, Fano collineations built as line-preserving
  permutations, explicit cone projections);
* spglib (one-atom cell; ``delaunay_reduce``, ``niggli_reduce``; the critical symprec of
  its lattice verdict, bisected by bench/calibrate_deformation.py) and pymatgen
  (``Lattice.get_niggli_reduced_lattice``);
* International Tables for Crystallography Vol. A: metric conditions and
  centring vectors of the 14 Bravais lattices (in brute3d.random_lattice).
"""

import itertools
import sys
from pathlib import Path

import numpy as np
import pytest
import spglib
from hypothesis import example, given, settings, strategies as st, HealthCheck

import brute3d as B
from driftwatch import lattice3d as L
from driftwatch.errors import LatticeError

sys.path.insert(0, str(Path(__file__).resolve().parent.parent / "bench"))
import calibrate_deformation as CAL  # noqa: E402  (spglib sampling and bisection)

ALL14 = ("aP",) + L.TYPES


def closure_up(t):
    """t and every type t specialises (transitive closure of SPECIALISES)."""
    out = {t}
    for u in L.SPECIALISES[t]:
        out |= closure_up(u)
    return out


def gram_equal_up_to_perm(x, y, perms, tol):
    return min(np.abs(x - y[g]).max() for g in perms) <= tol


# ----------------------------------------------------------------------------- check values

CHECK = {  # source: shared/math.md section 4 (3D rows)
    "cP": (3 * np.eye(3), (0, 0, 3, 0, 3, 3), (0, 0, 0, 0, 3, 3, 3),
           dict(cP=0, cI=3.67423461, cF=2.59807621, tP=0, tI=2.59807621, hP=2.44948974,
                hR=0, oP=0)),
    "cI": (1.5 * np.array([[-1, 1, 1], [1, -1, 1], [1, 1, -1.]]), (1.5,) * 6, (0,) + (1.5,) * 6,
           dict(cP=2.59807621, cI=0, cF=2.12132034, tP=2.59807621, tI=0, hP=2.12132034,
                hR=0, oP=2.59807621)),
    "cF": (1.5 * np.array([[0, 1, 1], [1, 0, 1], [1, 1, 0.]]), (0, 1.5, 1.5, 1.5, 1.5, 0),
           (0, 0, 0) + (1.5,) * 4,
           dict(cP=1.5, cI=1.73205081, cF=0, tP=1.5, tI=0, hP=1.93649167, hR=0, oP=1.5)),
    "tP": (np.diag([3, 3, 4.]), (0, 0, 3, 0, 3, 4), (0, 0, 0, 0, 3, 3, 4),
           dict(cP=0.816496581, cI=4.163332, cF=3, tP=0, tI=2.6925824, hP=2.44948974,
                hR=0.816496581, oP=0)),
    "oP": (np.diag([3, 4, 5.]), (0, 0, 3, 0, 4, 5), (0, 0, 0, 0, 3, 4, 5),
           dict(cP=1.41421356, cI=5.09901951, cF=3.74165739, tP=0.707106781, tI=2.6925824,
                hP=2.94392029, hR=1.41421356, oP=0)),
}


@pytest.mark.parametrize("name", sorted(CHECK))
def test_check_values_math_md(name):
    basis, rp, r7, dist = CHECK[name]
    # source: shared/math.md section 4, reproduced to 1e-9 relative (zeros to 1e-7 Å,
    # the square-root noise of an exact zero conorm, math.md 2.6)
    np.testing.assert_allclose(L.root_products(basis), rp, rtol=1e-9, atol=1e-7)
    np.testing.assert_allclose(L.fano_roots(basis), r7, rtol=1e-9, atol=1e-7)
    d = L.distances(basis)
    for t, v in dist.items():
        assert d[t] == pytest.approx(v, rel=1e-8, abs=1e-7), t


def test_closed_values_math_md():
    # source: shared/math.md 2.5 closed values (projection confirmed by optimiser there)
    a = 3.3
    d = L.distances(a * np.eye(3))
    assert d["cI"] == pytest.approx(a * np.sqrt(6) / 2, rel=1e-9)
    assert d["cF"] == pytest.approx(a * np.sqrt(3) / 2, rel=1e-9)
    assert d["tI"] == pytest.approx(a * np.sqrt(3) / 2, rel=1e-9)
    assert d["hP"] == pytest.approx(a * np.sqrt(2 / 3), rel=1e-9)
    assert d["oI"] == pytest.approx(a / np.sqrt(2), rel=1e-9)
    c = 4.1
    assert L.distances(np.diag([a, a, c]))["cP"] == pytest.approx(np.sqrt(2 / 3) * (c - a),
                                                                  rel=1e-9)


# ----------------------------------------------------------------------------- reduction

def _same_lattice(a, b):
    m = np.asarray(a) @ np.linalg.inv(np.asarray(b))
    return np.allclose(m, np.rint(m), atol=1e-6) and abs(abs(np.linalg.det(np.rint(m))) - 1) < 1e-9


@pytest.mark.parametrize("kind", ALL14)
def test_selling_vs_brute_force_superbases(kind):
    rng = np.random.default_rng(11 + ALL14.index(kind))
    basis = B.random_lattice(kind, rng) @ B.random_rotation(rng).T
    v = L.selling_reduce(basis)
    scale = np.max(np.einsum("ij,ij->i", v, v))
    assert np.allclose(v.sum(axis=0), 0, atol=1e-12 * np.sqrt(scale))
    assert all(v[i] @ v[j] <= 1e-12 * scale for i, j in B.PAIRS)  # obtuse
    assert _same_lattice(v[1:], basis)
    # source: brute3d enumeration of all obtuse superbases; ours is one of them
    # (conorms equal up to the 24 index permutations)
    perms = B.s4_on_edges()
    mine = -np.array([v[i] @ v[j] for i, j in B.PAIRS])
    brute = [B.conorms6(s) for s in B.obtuse_superbases(basis)]
    assert any(gram_equal_up_to_perm(mine, p, perms, 1e-9 * scale) for p in brute)
    # source: brute3d vonorms -> Fano conorms; = our 6 conorms + 0 up to GL(3,2)
    fb = B.fano_conorms(basis)
    ours = np.append(mine, 0.0)
    assert gram_equal_up_to_perm(ours, fb, B.fano_collineations(), 1e-9 * scale)
    # every zero of the Fano vector is one class of obtuse superbases (math.md 2.2);
    # the brute-force superbase count is at least the number of zeros
    assert len(brute) >= int((fb <= 1e-9 * scale).sum())


def test_skewed_and_near_degenerate_input_fast_and_exact():
    # source: shared/math.md 2.1 (LLL-type reduction before Selling) and 2.6; the
    # reference values are those of the unskewed basis (same lattice, common practice)
    rng = np.random.default_rng(3)
    base = B.random_lattice("oI", rng)
    # skew 1e6 in one vector, 1e4 in two (plain Selling would need ~10^6 steps); more
    # skew in two vectors is below the contract's singularity bound |det| <= 1e-12 prod|b|
    for m in ([[1, 0, 0], [1_000_000, 1, 0], [3, -7, 1]],
              [[1, 0, 0], [10_000, 1, 0], [-9_999, 3, 1]]):
        skewed = np.array(m) @ base
        # the float skewed cell is the lattice only to ~1e-16 x 1e6 |b| (input rounding),
        # so compare conorms (Å^2), which move linearly, to 1e-8 Å^2
        np.testing.assert_allclose(L.fano_conorms(skewed), L.fano_conorms(base), atol=1e-8)
        d0, d1 = L.deformation(base), L.deformation(skewed)
        # derived (lattice3d docstring): a conorm error e (Å^2) moves lengths and angle
        # coordinates by <= ~4 e / l and the frame weights by <= 32 (e / l^2) x D
        lmin = np.sqrt(B.vonorms(base).min())   # shortest vector (brute force)
        for t in L.TYPES:
            assert abs(d0[t] - d1[t]) <= 1e-8 / lmin * (8 + 64 * d0[t] / lmin), t
    with pytest.raises(LatticeError, match="singular"):
        L.fano_roots(np.array([[1, 0, 0], [1_000_000, 1, 0], [-999_999, 3, 1]]) @ base)
    # a nearly flat cell (height 1e-6 of the edges) is still a lattice, and is reduced exactly
    flat = np.array([[3.0, 0, 0], [1.1, 2.9, 0], [0.4, 0.7, 3e-6]])
    v = L.selling_reduce(flat)
    assert _same_lattice(v[1:], flat)
    assert all(v[i] @ v[j] <= 1e-12 * np.max(np.einsum("ij,ij->i", v, v)) for i, j in B.PAIRS)


@pytest.mark.parametrize("seed", range(6))
def test_against_spglib_delaunay_and_niggli(seed):
    rng = np.random.default_rng(100 + seed)
    kind = ALL14[seed * 2 % 14]
    basis = B.random_lattice(kind, rng) @ B.random_rotation(rng).T
    basis = B.random_unimodular(rng, target=20) @ basis
    v = L.selling_reduce(basis)
    scale = np.max(np.einsum("ij,ij->i", v, v))
    # source: spglib.delaunay_reduce - same lattice, same conorms up to relabelling.
    # spglib returns three of the seven coset-minimal vectors (v_i, v_i + v_j) of its
    # obtuse superbase, so its vonorms are attained with coefficients in {-1, 0, 1};
    # the Fano conorms follow from the vonorms (brute3d formula).
    d = spglib.delaunay_reduce(basis, eps=1e-10)
    assert _same_lattice(d, basis) and _same_lattice(v[1:], d)
    box = np.array(list(itertools.product((-1, 0, 1), repeat=3)))
    w = box @ d
    n2 = np.einsum("ij,ij->i", w, w)
    vn = np.array([n2[np.all((box - x) % 2 == 0, axis=1)].min() for x in B.FANO])
    pts = np.array(B.FANO)
    pd = np.array([-0.25 * sum((-1) ** int(xi @ x % 2) * vn[k] for k, x in enumerate(pts))
                   for xi in pts])
    assert pd.min() >= -1e-9 * scale and np.sort(pd)[0] <= 1e-9 * scale
    ours = np.append(-np.array([v[i] @ v[j] for i, j in B.PAIRS]), 0)
    assert gram_equal_up_to_perm(ours, pd, L._gl32(), 1e-9 * scale)
    # source: spglib.niggli_reduce and pymatgen - the shortest vector is a coset minimum,
    # and every Niggli length is among our 7 vonorms (|v_i|^2, |v_i + v_j|^2)
    from pymatgen.core import Lattice
    vn = [v[i] @ v[i] for i in range(4)] + [(v[0] + v[j]) @ (v[0] + v[j]) for j in (1, 2, 3)]
    for nig in (spglib.niggli_reduce(basis, eps=1e-10),
                Lattice(basis).get_niggli_reduced_lattice().matrix):
        n2 = np.sort(np.einsum("ij,ij->i", nig, nig))
        assert n2[0] == pytest.approx(min(vn), rel=1e-9)
        for x in n2:
            assert min(abs(x - y) for y in vn) <= 1e-9 * scale


# ----------------------------------------------------------------------------- patterns and types

def test_relabellings_are_the_168_collineations_of_the_fano_plane():
    # GL(3, 2) built from invertible 0/1 matrices equals the permutations of the 7 points that map
    # lines to lines, found by trying all 5040 (the collineation group of the Fano plane has order
    # 168: a handbook fact of finite geometry); the same FANO labels on both sides
    assert B.FANO == L._FANO
    ours = {tuple(r) for r in L._gl32().tolist()}
    assert len(ours) == 168 and ours == {tuple(r) for r in B.fano_collineations().tolist()}


def test_pattern_table_rederived_with_spglib():
    """Re-derive the maximal conorm patterns of every type and compare with the module table.

    Source: spglib (symprec 1e-5, one-atom cell) on random realisations of every
    zero/equality pattern of the Fano 7-vector, enumerated up to GL(3, 2) by brute force.
    """
    G = B.fano_collineations()
    rng = np.random.default_rng(7)

    def partitions(s):
        if not s:
            yield []
            return
        for rest in partitions(s[1:]):
            for k in range(len(rest)):
                yield rest[:k] + [[s[0]] + rest[k]] + rest[k + 1:]
            yield [[s[0]]] + rest

    def canon(z, blocks):
        return min((tuple(sorted(g[i] for i in z)),
                    tuple(sorted(tuple(sorted(g[i] for i in b)) for b in blocks))) for g in G)

    pats = {}
    for nz in range(1, 5):
        for z in itertools.combinations(range(7), nz):
            for part in partitions([i for i in range(7) if i not in z]):
                pats.setdefault(canon(z, part), None)
    assert len(pats) == 60  # 60 patterns up to GL(3,2) (math.md 2.4 quotes 64 incl. 5+ zeros)
    typed = {}
    for key in pats:
        z, blocks = key
        kinds = set()
        for _ in range(2):
            vals = np.sort(rng.uniform(0.5, 3.0, len(blocks)))
            vals = rng.permutation(vals + 0.1 * np.arange(len(vals)))
            x = np.zeros(7)
            for val, blk in zip(vals, blocks, strict=True):
                x[list(blk)] = val
            try:
                basis = B.basis_from_fano(x)
            except np.linalg.LinAlgError:  # Gram matrix singular: degenerate pattern
                basis = np.zeros((3, 3))
            if abs(np.linalg.det(basis)) < 1e-6 * np.prod(np.linalg.norm(basis, axis=1)):
                kinds.add(None)
            else:
                kinds.add(B.pearson(basis))
        assert len(kinds) == 1  # the type is a function of the exact pattern
        typed[key] = kinds.pop()
    real = {k: t for k, t in typed.items() if t is not None}
    assert len(real) == 57  # source: math.md 2.4 (57 realisable)

    def implies(p, q):  # cone(p) inside some relabelling of cone(q)
        zp, bp = set(p[0]), p[1]
        owner = {i: n for n, b in enumerate(bp) for i in b}
        for g in G:
            if not {g[i] for i in q[0]} <= zp:
                continue
            ok = True
            for b in q[1]:
                bb = [g[i] for i in b]
                if all(i in zp for i in bb):
                    continue
                if any(i in zp for i in bb) or len({owner[i] for i in bb}) > 1:
                    ok = False
                    break
            if ok:
                return True
        return False

    # refinement of patterns = specialisation of types (SPECIALISES is consistent)
    for p, tp in real.items():
        for q, tq in real.items():
            if p != q and implies(p, q):
                assert tq in closure_up(tp), (tp, tq)
    for t in L.TYPES:
        members = [p for p, tp in real.items() if t in closure_up(tp)]
        maximal = {p for p in members if not any(q != p and implies(p, q) for q in members)}
        ours = {canon(*_module_pattern(spec)) for spec in L._PATTERNS[t]}
        assert ours == maximal, t


def _module_pattern(spec):
    z, blocks = L._parse(spec)
    singles = [(i,) for i in range(7) if i not in z and not any(i in b for b in blocks)]
    return tuple(z), [tuple(b) for b in blocks] + singles


def test_cone_distances_vs_brute_projection():
    # source: brute3d.cone_distance (explicit projection over the 168 collineations);
    # the nearest cone point is an actual lattice of the type (spglib) at that distance
    rng = np.random.default_rng(21)
    for kind in ("aP", "mS", "oI", "hR"):
        basis = B.random_lattice(kind, rng)
        x = np.sqrt(np.maximum(B.fano_conorms(basis), 0))
        for metric in ("l2", "linf"):
            d = L.distances(basis, metric)
            for t in ("mS", "oI", "tI", "hR", "cF", "hP"):
                pats = [_module_pattern(s) for s in L._PATTERNS[t]]
                ref, y = B.cone_distance(x, pats, metric)
                # abs 1e-7: square-root noise of an exact zero conorm (math.md 2.6)
                assert d[t] == pytest.approx(ref, rel=1e-9, abs=1e-7), (kind, t, metric)
                if metric == "l2" and ref > 1e-3:
                    near = B.basis_from_fano(y ** 2)
                    assert t in closure_up(B.pearson(near, 1e-5))
                    assert L.lattice_distance(basis, near) == pytest.approx(ref, rel=1e-6)


@pytest.mark.parametrize("kind", ALL14)
def test_random_bravais_lattices_against_spglib(kind):
    """Random lattices of each type (International Tables metric conditions).

    0 to own type and to every type it specialises, positive to the rest; the
    most specific zero-distance type = spglib's type of the one-atom cell
    (symprec 1e-5); brute-force point-group order agrees.
    """
    rng = np.random.default_rng(1000 + ALL14.index(kind))
    order = {"a": 2, "m": 4, "o": 8, "t": 16, "h": 24, "c": 48}
    for _ in range(8):
        basis = B.random_lattice(kind, rng) @ B.random_rotation(rng, rng.random() < 0.5).T
        basis = B.random_unimodular(rng, target=10) @ basis
        assert B.pearson(basis) == kind  # source: spglib
        scale = np.sqrt(np.abs(np.linalg.det(basis)) ** (2 / 3))
        d = L.distances(basis)
        f = L.deformation(basis)
        zero = closure_up(kind) - {"aP"}
        for t in L.TYPES:
            if t in zero:
                assert d[t] <= 1e-6 * scale and f[t] <= 1e-9 * scale, (kind, t, d[t])
            else:
                assert d[t] > 1e-2 * scale and f[t] > 1e-3 * scale, (kind, t, d[t])
        assert L.most_specific(d, 1e-6 * scale) == kind
        assert L.most_specific(f, 1e-9 * scale) == kind
    # source: brute-force point-group count (holohedry order, hR 12)
    expect = 12 if kind == "hR" else order[kind[0]]
    assert B.point_group_order(basis) == expect


def test_containment_graph_math_md():
    # source: shared/math.md 2.5 (transitive closure of the listed edges)
    assert closure_up("cP") == {"cP", "tP", "hR", "oP", "oS", "mP", "mS", "aP"}
    assert "tI" not in closure_up("cP")
    assert not {"oP", "oS", "mP"} & closure_up("cI")
    assert "hR" not in closure_up("hP")
    assert set(L.SPECIALISES) == set(ALL14)


def test_system_distances_and_most_specific():
    # contract: docs/internals.md (system = min over its types); common practice for
    # the tolerance behaviour of a nearly cubic tP cell
    basis = np.diag([3.0, 3.0, 3.0 * (1 + 1e-3)])
    d = L.distances(basis)
    s = L.system_distances(basis)
    for name, ts in L.SYSTEMS.items():
        assert s[name] == pytest.approx(min(d[t] for t in ts))
    assert s["tetragonal"] == 0 and s["cubic"] > 0
    assert L.most_specific(d, 1e-2) == "cP"  # common practice: coarse tolerance sees cubic
    assert L.most_specific(d, 1e-6) == "tP"
    arr = L.distances(np.stack([basis, np.diag([3.0, 4, 5])]))
    assert list(L.most_specific(arr, 1e-6)) == ["tP", "oP"]
    assert L.most_specific({t: 1.0 for t in L.TYPES}, 0.1) == "aP"


# ----------------------------------------------------------------------------- continuity

def _wall_basis(p12):
    # conorms (1, 1.6, 2.2, p12, 2.9, 3.7) of shared/math.md 2.3; p12 < 0 is a valid
    # Gram matrix whose obtuse superbase is the flipped one
    return B.basis_from_conorms((1, 1.6, 2.2, p12, 2.9, 3.7))


def test_zero_conorm_wall_fano7_continuous():
    a, b, w = _wall_basis(1e-4), _wall_basis(-1e-4), _wall_basis(0.0)
    # source: shared/math.md 2.3 - root6 (brute force over all superbases) jumps:
    assert B.root6_distance(a, b) == pytest.approx(0.931, abs=2e-3)
    assert B.root6_distance(a, w) == pytest.approx(0.010, abs=1e-3)
    # fano7 (ours; brute3d.fano7_distance independently) is continuous: 0.0141 Å
    assert L.lattice_distance(a, b) == pytest.approx(0.0141, abs=2e-4)
    # abs 1e-7: square-root noise of the brute vonorm zero (2e-8 Å, math.md 2.6)
    assert L.lattice_distance(a, b) == pytest.approx(B.fano7_distance(a, b), abs=1e-7)
    assert L.lattice_distance(a, w) == pytest.approx(0.010, abs=2e-4)
    # walking through the wall: distances to every type change by at most
    # |R7 step| (1-Lipschitz), so no jump; deformation changes like the conorm step
    ps = np.linspace(1e-4, -1e-4, 201)
    cells = np.stack([_wall_basis(p) for p in ps])
    d = L.distances(cells)
    f = L.deformation(cells)
    steps = L.lattice_distance(cells[1:], cells[:-1])
    assert steps.max() < 3e-3
    for t in L.TYPES:
        assert np.all(np.abs(np.diff(d[t])) <= steps + 1e-12), t
        assert np.abs(np.diff(f[t])).max() < 1e-5, t


def test_strained_cube_no_jump_to_cF():
    # source: shared/math.md 2.5 - fano7 distance of cP to cF is a sqrt(3)/2 and stays
    # continuous under tiny strain (root6 of one Selling superbase jumps to a sqrt2)
    a = 1.0
    cube = a * np.eye(3)
    rng = np.random.default_rng(4)
    for eps in (1e-8, 1e-6, 1e-4):
        s = rng.normal(size=(3, 3))
        s = eps * (s + s.T) / np.linalg.norm(s + s.T, 2)
        d = L.distances(cube @ (np.eye(3) + s))["cF"]
        assert abs(d - a * np.sqrt(3) / 2) <= 10 * np.sqrt(eps * a)


@pytest.mark.parametrize("kind,perturb,target,power", [
    ("cP", "shear", "cP", 0.5),   # a zero conorm opens: root distance ~ sqrt(eps)
    ("cP", "stretch", "cP", 1.0),  # only non-zero conorms move: ~ eps
    ("hP", "shear", "hP", 0.5),
    ("cI", "stretch", "cI", 1.0),
])
def test_eps_scaling(kind, perturb, target, power):
    # common practice: d(eps) / eps^power is constant as eps -> 0; never 0, no jump;
    # deformation is linear in eps in every case
    rng = np.random.default_rng(9)
    basis = B.random_lattice(kind, rng)
    ratios, dratios = [], []
    for eps in (1e-8, 1e-7, 1e-6, 1e-5):
        if perturb == "shear":
            m = np.eye(3)
            m[0, 2] = eps
        else:
            m = np.diag([1, 1, 1 + eps])
        cell = basis @ m
        d = L.distances(cell)[target]
        f = L.deformation(cell)[target]
        assert d > 0 and f > 0
        ratios.append(d / eps ** power)
        dratios.append(f / eps)
    assert max(ratios) / min(ratios) < 1.05
    assert max(dratios) / min(dratios) < 1.05


# ----------------------------------------------------------------------------- invariance

@settings(max_examples=40, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(st.integers(0, 10**6), st.sampled_from(ALL14), st.booleans())
@example(39146, "tI", False)     # the reduction had cycled between two bases at a tie (|mu| = 1/2)
@example(1761, "oI", True)       # the cI deformation's rounding at 1.2x the old tol_p / ell
def test_invariance_rotation_reflection_unimodular(seed, kind, reflect):
    # common practice (math.md 3.1): invariants unchanged by rotation, mirror and a
    # unimodular change of basis.  Large entries (>= 1000): conorms and deformation
    # (linear in the rounding of the input, ~1e-16 |U|^2 |b|^2); moderate entries
    # (>= 30): root-space values, where a zero conorm's rounding is square-rooted.
    # The deformation reads the conventional cells of the centred types, whose vectors are sums
    # of up to three reduced ones: its rounding is up to ~4x tol_p / ell (the worst of 1.4e5
    # random cases here), so it is allowed 16x.
    rng = np.random.default_rng(seed)
    basis = B.random_lattice(kind, rng)
    scale = np.abs(np.linalg.det(basis)) ** (1 / 3)
    big = B.random_unimodular(rng, target=1000)
    other = big @ basis @ B.random_rotation(rng, reflect).T
    assert np.abs(big).max() >= 1000 and abs(round(np.linalg.det(big))) == 1
    # the float input is the lattice only to ~eps |row|^2 (Å^2); worst seen 205 eps |row|^2
    tol_p = 2e-13 * np.einsum("ij,ij->i", other, other).max()
    np.testing.assert_allclose(L.fano_conorms(other), L.fano_conorms(basis), atol=tol_p)
    f0, f1 = L.deformation(basis), L.deformation(other)
    ell = np.sqrt(L.conorms(basis).sum() / 3)
    for t in L.TYPES:
        assert f1[t] == pytest.approx(f0[t], abs=16 * tol_p / ell)
    u = B.random_unimodular(rng, target=30)
    mod = u @ basis @ B.random_rotation(rng, reflect).T
    tol = 1e-7 * np.abs(u).max() * scale  # sqrt(1e-16 |U|^2 |b|^2), math.md 2.6
    np.testing.assert_allclose(L.fano_roots(mod), L.fano_roots(basis), atol=tol)
    np.testing.assert_allclose(L.root_products(mod), L.root_products(basis), atol=tol)
    d0, d1 = L.distances(basis), L.distances(mod)
    for t in L.TYPES:
        assert d1[t] == pytest.approx(d0[t], abs=tol)
    assert L.lattice_distance(basis, mod) <= tol
    assert L.most_specific(d1, 1e-5 * scale) == L.most_specific(d0, 1e-5 * scale) == \
        (kind if kind != "aP" else "aP")


def test_root_products_canonical_on_special_lattices():
    # isometric copies of special lattices (several superbases, ties) give the same
    # canonical root products (source: the canonical definition in math.md 2.3)
    rng = np.random.default_rng(5)
    for kind in ("cP", "cF", "tP", "hP", "hR", "oS", "mS"):
        basis = B.random_lattice(kind, rng)
        ref = L.root_products(basis)
        for _ in range(5):
            other = B.random_unimodular(rng, target=20) @ basis @ B.random_rotation(rng, True).T
            np.testing.assert_allclose(L.root_products(other), ref, atol=1e-6 * ref.max())
        # lexicographic minimum over all superbases (brute force) and S4
        perms = B.s4_on_edges()
        cands = [B.conorms6(s)[p] for s in B.obtuse_superbases(basis) for p in perms]
        best = min(cands, key=lambda c: tuple(np.round(c / ref.max() ** 2, 7)))
        np.testing.assert_allclose(ref, np.sqrt(np.maximum(best, 0)), atol=1e-6 * ref.max())


# ----------------------------------------------------------------------------- metric

def test_lattice_distance_metric_properties():
    rng = np.random.default_rng(17)
    lat = [B.random_lattice(k, rng) for k in ALL14 for _ in range(2)]
    n = len(lat)
    A = np.stack(lat)
    D = np.array([L.lattice_distance(A, np.stack([lat[j]] * n)) for j in range(n)])
    assert np.allclose(D, D.T, atol=1e-12)  # symmetry
    assert np.all(np.diag(D) <= 1e-7)
    off = D[~np.eye(n, dtype=bool)]
    assert off.min() > 1e-3  # non-isometric lattices are apart
    for i, j, k in itertools.product(range(0, n, 3), repeat=3):
        assert D[i, k] <= D[i, j] + D[j, k] + 1e-12  # triangle inequality
    # source: brute3d (vonorm-based R7, line-preserving collineations); and d7 <= root6
    for i, j in ((0, 5), (3, 20), (11, 26)):
        for metric in ("l2", "linf"):
            assert L.lattice_distance(lat[i], lat[j], metric) == pytest.approx(
                B.fano7_distance(lat[i], lat[j], metric), rel=1e-9)
        assert D[i, j] <= B.root6_distance(lat[i], lat[j]) + 1e-7


def test_isometric_copy_zero_distance():
    rng = np.random.default_rng(23)
    for kind in ALL14:
        b = B.random_lattice(kind, rng)
        c = B.random_unimodular(rng, target=20) @ b @ B.random_rotation(rng, True).T
        # root-space zero: sqrt of conorm rounding (~1e-16 |U|^2 |b|^2), math.md 2.6
        assert L.lattice_distance(b, c) <= 1e-6 * np.abs(b).max()
        assert L.lattice_distance(b, c, "linf") <= 1e-6 * np.abs(b).max()


# ----------------------------------------------------------------------------- calibration

def test_deformation_calibrated_families_spglib():
    """source: spglib 2.8 (one-atom cell; critical symprec by log bisection in
    bench/calibrate_deformation.py).  Derived: spglib flips a sheared right angle at
    symprec 2 sqrt(|a||c|) theta and a length mismatch at |c| - |a|; the deformation
    measures the same (x KAPPA), whatever the aspect ratio."""
    a = 3.7
    for e in (1e-5, 1e-3, 1e-2):
        shear = a * np.array([[1, 0, 0], [np.sin(e), np.cos(e), 0], [0, 0, 1.]])
        for metric in ("l2", "linf"):
            assert L.deformation(shear, metric)["cP"] / CAL.critical_symprec(shear, "cP") == \
                pytest.approx(L.KAPPA, rel=5e-3)
        stretch = a * np.diag([1, 1, 1 + e])
        crit = CAL.critical_symprec(stretch, "cP")
        assert L.deformation(stretch, "linf")["cP"] / crit == pytest.approx(L.KAPPA, rel=5e-3)
        # l2 adds the (half-weighted) angle change of the diagonals: 1.13 measured
        assert 1.12 <= L.deformation(stretch, "l2")["cP"] / crit <= 1.14
    # the sheared tetragonal cell of aspect 2 and 4 (the old measure gave 0.35 and 0.20)
    for c in (2.0, 4.0):
        cell = np.array([[3, 0, 0], [0, 3, 0], [3 * c * np.sin(1e-4), 0, 3 * c * np.cos(1e-4)]])
        for metric in ("l2", "linf"):
            assert L.deformation(cell, metric)["tP"] / CAL.critical_symprec(cell, "tP") == \
                pytest.approx(L.KAPPA, rel=5e-3)


@pytest.mark.parametrize("kind", L.TYPES)
def test_deformation_within_factor_two_of_spglib(kind):
    """source: spglib 2.8 (one-atom cell, critical symprec by log bisection).  Random cells
    of the type (International Tables metric conditions and centring matrices, confirmed by
    spglib), half with aspect ratio 3.5 .. 4 where the type allows it, under random strains
    of 1e-5 .. 1e-2: deformation / critical symprec within 0.5 .. 2 for both metrics."""
    rng = np.random.default_rng(L.TYPES.index(kind) + 70)
    fixed = kind[0] == "c"            # cubic cells have aspect 1
    for aspect in ((1.0, 4.0), (1.0, 4.0), (3.5, 4.0), (3.5, 4.0)):
        if kind == "hR" and aspect[0] > 1:
            aspect = (2.0, 4.0)      # rhombohedral reduced cells reach aspect ~2.8 only
        cells, crit, asp, _ = CAL.sample(3, kind, 1, rng, (1.0, 4.0) if fixed else aspect)
        for metric in ("l2", "linf"):
            r = L.deformation(cells[0], metric)[kind] / crit[0]
            assert 0.5 <= r <= 2.0, (kind, metric, r, asp[0])


def test_deformation_lipschitz_bound():
    # derived (lattice3d docstring): a basis change delta (max entry) moves the coset vectors
    # (short integer combinations of the reduced basis) by <= 3 sqrt3 delta, lengths by as
    # much, angle coordinates by (2/sqrt3)(sqrt(rho) + 1/sqrt(rho)) times that (rho = aspect),
    # flips twice that; weights (lambda / l)^16 add <= 32 x (3 sqrt3 delta / l_min) x D.
    # Bound used: (12 (sqrt(rho) + 1) + 200 D / l_min) delta, KAPPA < 1.
    rng = np.random.default_rng(61)
    for _ in range(60):
        kind = ALL14[rng.integers(len(ALL14))]
        base = B.random_lattice(kind, rng) @ B.random_rotation(rng).T
        n = np.sqrt(B.vonorms(base))          # the 7 coset minima (brute force)
        lmin, rho = n.min(), n.max() / n.min()
        cells = base + rng.normal(size=(4, 3, 3)) * 1e-7 * lmin
        for metric in ("l2", "linf"):
            d0, d = L.deformation(base, metric), L.deformation(cells, metric)
            for t in L.TYPES:
                step = np.abs(cells - base).max(axis=(1, 2))
                bound = (12 * (np.sqrt(rho) + 1) + 200 * np.maximum(d[t], d0[t]) / lmin) * step
                assert np.all(np.abs(d[t] - d0[t]) <= bound + 1e-15), (kind, t, metric)


def test_deformation_continuous_where_the_frame_changes():
    # common practice (continuity): a tetragonal cell stretched through c = a (the third
    # shortest vector changes) and a monoclinic cell sheared through beta = 90 deg (a
    # zero-conorm wall) change their deformations by steps of the order of the basis step
    a = 3.2
    ratios = np.linspace(0.999, 1.001, 101)
    stretch = np.stack([np.diag([a, a * 1.07, a * r]) for r in ratios])
    betas = np.radians(np.linspace(89.995, 90.005, 101))
    shear = np.stack([[[a, 0, 0], [0, 4.1, 0], [5.3 * np.cos(bb), 0, 5.3 * np.sin(bb)]]
                      for bb in betas])
    for cells in (stretch, shear):
        step = np.abs(np.diff(cells, axis=0)).max()
        for metric in ("l2", "linf"):
            d = L.deformation(cells, metric)
            for t in L.TYPES:
                assert np.abs(np.diff(d[t])).max() <= 20 * step, (t, metric)
    d = L.deformation(shear)
    assert d["oP"][50] <= 1e-12 and d["oP"][0] > 1e-6    # orthorhombic at beta = 90


# ----------------------------------------------------------------------------- errors and shapes

@pytest.mark.parametrize("bad,msg", [
    (np.array([[1, 0, 0], [0, 1, 0], [1, 1, 0.]]), "singular"),
    (np.array([[1, 0, 0], [0, 1, 0], [1, 1, 1e-13]]), "singular"),
    (np.array([[1, 0, 0], [0, 0, 0], [0, 0, 1.]]), "zero"),
    (np.array([[1, 0, 0], [0, np.nan, 0], [0, 0, 1.]]), "non-finite"),
    (np.array([[1, 0, 0], [0, np.inf, 0], [0, 0, 1.]]), "non-finite"),
])
def test_lattice_error(bad, msg):
    # contract: docs/internals.md / brief (|det| <= 1e-12 prod|b_i| is singular; the
    # message names the frame and the problem)
    for f in (L.selling_reduce, L.root_products, L.fano_roots, L.distances, L.deformation):
        with pytest.raises(LatticeError, match=msg):
            f(bad)
    frames = np.stack([np.eye(3), np.eye(3), bad])
    with pytest.raises(LatticeError, match="frame 2"):
        L.distances(frames)
    with pytest.raises(LatticeError, match="shape"):
        L.root_products(np.eye(2))


def test_shapes_and_single_frame():
    # contract: docs/internals.md (shapes; a single basis gives no frame axis)
    rng = np.random.default_rng(2)
    cells = np.stack([B.random_lattice(k, rng) for k in ALL14])
    assert L.selling_reduce(cells).shape == (14, 4, 3)
    assert L.root_products(cells).shape == (14, 6)
    assert L.fano_roots(cells).shape == (14, 7)
    d = L.distances(cells, "linf")
    assert set(d) == set(L.TYPES) and d["cP"].shape == (14,)
    assert set(L.system_distances(cells)) == set(L.SYSTEMS)
    one = L.distances(cells[3])
    assert np.ndim(one["cP"]) == 0 and one["cP"] == pytest.approx(L.distances(cells)["cP"][3])
    assert L.lattice_distance(cells, cells[0]).shape == (14,)
    assert isinstance(L.lattice_distance(cells[0], cells[1]), float)
    with pytest.raises(ValueError):
        L.distances(cells, metric="l1")


def test_invariants_one_call_matches_separate_functions():
    # internal consistency (common practice): the one-call path equals the public functions
    rng = np.random.default_rng(8)
    cells = np.stack([B.random_lattice(k, rng) for k in ALL14 for _ in range(3)])
    for metric in ("l2", "linf"):
        inv = L.invariants(cells, metric)
        np.testing.assert_array_equal(inv["root_products"], L.root_products(cells))
        np.testing.assert_array_equal(inv["fano_roots"], L.fano_roots(cells))
        np.testing.assert_array_equal(inv["superbase"], L.selling_reduce(cells))
        for key, ref in (("distance", L.distances(cells, metric)),
                         ("deformation", L.deformation(cells, metric)),
                         ("systems", L.system_distances(cells, metric))):
            assert set(inv[key]) == set(ref)
            for t in ref:
                np.testing.assert_array_equal(inv[key][t], ref[t])


def test_scale_covariance_and_empty_input():
    # common practice: lengths scale with the cell; tolerances are relative, so tiny
    # and huge cells behave alike
    rng = np.random.default_rng(31)
    basis = B.random_lattice("mS", rng)
    d = L.distances(basis)
    f = L.deformation(basis, "linf")
    for lam in (1e-4, 1e4):
        dl = L.distances(lam * basis)
        fl = L.deformation(lam * basis, "linf")
        for t in L.TYPES:
            assert dl[t] == pytest.approx(lam * d[t], rel=1e-9, abs=1e-7 * lam)
            assert fl[t] == pytest.approx(lam * f[t], rel=1e-9, abs=1e-12 * lam)
        np.testing.assert_allclose(L.root_products(lam * basis), lam * L.root_products(basis),
                                   rtol=1e-9, atol=1e-7 * lam)
    empty = np.zeros((0, 3, 3))
    assert L.root_products(empty).shape == (0, 6)
    assert L.distances(empty)["cP"].shape == (0,)
    assert L.invariants(empty)["fano_roots"].shape == (0, 7)


def test_blocked_reduction_and_ranking_equal_one_pass(monkeypatch):
    # the reduction and the relabelling ranking run in blocks of frames for speed; with tiny
    # blocks (boundaries everywhere, a ragged last block) every output must be bit-identical
    # to one pass. Inputs mix random cells with exact cubic and fcc cells (ties everywhere).
    rng = np.random.default_rng(47)
    b = rng.normal(size=(103, 3, 3)) + np.diag([3.0, 3.5, 4.0])
    b[::5] = np.eye(3) * 4.0
    b[1::5] = [[0, 2, 2], [2, 0, 2], [2, 2, 0]]
    one = L.selling_reduce(b), L.root_products(b), L.distances(b)["cF"]
    monkeypatch.setattr(L, "_REDUCE_BLOCK", 7)
    monkeypatch.setattr(L, "_KEY_BLOCK", 5)
    blocked = L.selling_reduce(b), L.root_products(b), L.distances(b)["cF"]
    for x, y in zip(one, blocked):
        assert x.shape == y.shape and np.array_equal(x, y)


@pytest.mark.parametrize("metric", ["l2", "linf"])
def test_one_frame_at_a_time_equals_the_batch(metric):
    # the live tracker computes each new frame alone, analyze() all frames at once, and their
    # records must agree to the bit: every invariant of a frame computed alone (or in any slice)
    # equals the same frame's in a batch. (Before the cone blocks were padded, a lone frame took
    # BLAS's matrix-vector path and its L2 distances differed in the last bit.)
    rng = np.random.default_rng(48)
    b = rng.normal(scale=0.3, size=(300, 3, 3)) + np.diag([3.0, 3.5, 4.0])
    b[::7] = np.eye(3) * 4.0 + rng.normal(scale=1e-7, size=(3, 3))
    b[5::11] = np.array([[1, 3, 0], [0, 1, -2], [0, 0, 1.0]]) @ b[5::11]  # skewed: Gauss passes run
    full = L.invariants(b, metric)
    for s, e in [(i, i + 1) for i in range(0, 300, 13)] + [(3, 6), (10, 27), (100, 299)]:
        part = L.invariants(b[s:e], metric)
        for k, v in full.items():
            got = part[k]
            for t in (v if isinstance(v, dict) else {None: v}):
                x = v[t][s:e] if t is not None else v[s:e]
                y = got[t] if t is not None else got
                assert np.array_equal(x, y), (k, t, s, e)


@settings(max_examples=40, deadline=None, database=None,
          suppress_health_check=[HealthCheck.too_slow])
@given(st.integers(0, 10**6), st.sampled_from(ALL14), st.booleans(),
       st.floats(0.2, 5.0))
def test_size_is_invariant_and_scales_with_the_cell(seed, kind, reflect, factor):
    """deformation_and_size: the same deformation as deformation(); the size (sqrt of the conorms'
    sum) unchanged by rotation, mirror and a unimodular change of basis, times ``factor`` for the
    cell times ``factor``, equal to sqrt((|v0|^2 + ... + |v3|^2) / 2) of the obtuse superbase (the
    identity |v_i|^2 = sum_j p_ij of a superbase: common practice, math.md)."""
    rng = np.random.default_rng(seed)
    basis = B.random_lattice(kind, rng)
    u = B.random_unimodular(rng, target=30)
    other = u @ basis @ B.random_rotation(rng, reflect).T
    (f0, s0), (_, s1) = L.deformation_and_size(basis), L.deformation_and_size(other)
    ref = L.deformation(basis)
    assert all(f0[t] == ref[t] for t in L.TYPES)
    v = L.selling_reduce(basis)
    assert s0 == pytest.approx(np.sqrt((v ** 2).sum() / 2), rel=1e-12)
    assert s1 == pytest.approx(s0, rel=1e-9)
    assert L.deformation_and_size(factor * basis)[1] == pytest.approx(factor * s0, rel=1e-12)


@settings(max_examples=200, deadline=None)
@given(st.integers(0, 10**6))
def test_the_dot_product_of_two_coset_minima_from_the_conorms(seed):
    """The deformation's right angles are read from conorms: for two coset minima whose Fano
    points share the conorm points a and b, |v(x) . v(y)| is p_a + p_b, except on the three lines
    through the superbase's zero (the seventh Fano point), where it is |p_a - p_b|. Checked
    against the dot products of the vectors themselves, on random cells of every shape (an
    identity of the obtuse superbase, common practice to verify numerically). Where a right
    angle's line has another zero of the pattern as its third point, the flip bridges the two
    continuously (module docstring)."""
    rng = np.random.default_rng(seed)
    basis = rng.normal(size=(3, 3)) * rng.uniform(0.5, 3.0, size=(3, 1))
    v, p, _ = L._superbase(basis)
    pt = L._p7(p)[0]
    w = np.stack([v[0, 1], v[0, 2], v[0, 3], v[0, 1] + v[0, 2], v[0, 1] + v[0, 3],
                  v[0, 2] + v[0, 3], v[0, 0]])
    tab = L._deform_table()
    scale = float(np.max(np.abs(pt))) or 1.0
    through = 0
    for i, (a, b) in enumerate(tab["shared"][:2].T):
        third = [k for k, f in enumerate(L._FANO)
                 if f == tuple((np.array(L._FANO[a]) + L._FANO[b]) % 2)][0]
        dot = abs(float(w[tab["pa"][i]] @ w[tab["pb"][i]]))
        want = abs(pt[a] - pt[b]) if third == 6 else pt[a] + pt[b]
        assert abs(dot - want) <= 1e-12 * scale, (i, a, b, third, dot, want)
        through += third == 6
    assert through == 3


def test_a_lattice_of_each_type_in_any_orientation_and_basis_is_at_distance_zero():
    """ASE's Bravais lattice classes (ase.lattice; International Tables' 14 types) rotated and
    written in another basis (a unimodular change, common practice): the root-space distance to
    the lattice's own type is 0 to the rounding of the input (1e-12 of its scale), as the
    deformation is; a zero conorm computed as ~1e-16 |v|^2 had made it ~1e-8 |v| (an independent
    check of the maths). To a type the lattice is not, it stays well above."""
    from ase.lattice import (BCC, BCT, CUB, FCC, HEX, MCL, MCLC, ORC, ORCC, ORCF, ORCI, RHL,
                             TET)
    from scipy.spatial.transform import Rotation
    cases = {"cP": CUB(4.0), "cF": FCC(3.6), "cI": BCC(2.87), "tP": TET(3.0, 5.0),
             "tI": BCT(3.0, 5.0), "oP": ORC(3.0, 4.0, 5.0), "oF": ORCF(3.0, 4.0, 5.0),
             "oI": ORCI(3.0, 4.0, 5.0), "oS": ORCC(3.0, 4.0, 5.0), "hP": HEX(2.5, 4.1),
             "hR": RHL(3.0, 70.0), "mP": MCL(3.0, 4.0, 5.0, 70.0),
             "mS": MCLC(3.0, 4.0, 5.0, 70.0)}
    us = [np.eye(3, dtype=int), np.array([[1, 1, 0], [0, 1, 0], [2, 1, 1]]),
          np.array([[0, 1, 0], [1, 0, 0], [3, -2, 1]])]
    for k, (t, lat) in enumerate(cases.items()):
        for j, u in enumerate(us):
            cell = u @ lat.tocell()[:] @ Rotation.random(random_state=10 * k + j).as_matrix().T
            scale = np.abs(cell).max()
            dist, dfm = L.distances(cell), L.deformation(cell)
            assert dist[t] <= 1e-12 * scale and dfm[t] <= 1e-12 * scale, (t, j, dist[t])
            above = [x for x in L.TYPES if x != t and x not in _GENERAL[t]]
            assert all(dist[x] > 1e-3 for x in above), (t, j)


_GENERAL = {   # the types each type specialises (a lattice of t is also one of these)
    "cP": {"tP", "hR", "oP", "oS", "mP", "mS"}, "cF": {"tI", "hR", "oF", "oI", "mS"},
    "cI": {"tI", "hR", "oF", "oI", "mS"}, "tP": {"oP", "oS", "mP", "mS"},
    "tI": {"oF", "oI", "mS"}, "oP": {"mP"}, "oF": {"mS"}, "oI": {"mS"}, "oS": {"mP", "mS"},
    "hP": {"oS", "mP", "mS"}, "hR": {"mS"}, "mP": set(), "mS": set()}
