"""Continuous invariants of 3D lattices (pure numpy, vectorised over frames).

Conventions (team reference ``shared/math.md`` sections 0, 2 and 5):

* A basis is a (3, 3) array whose **rows** are the lattice vectors, in Angstrom.
  Every function accepts a stack ``(n, 3, 3)`` (one basis per frame) or a single
  ``(3, 3)`` basis; a single basis gives outputs without the frame axis.
* Superbase v0..v3 (v0 + v1 + v2 + v3 = 0, v1, v2, v3 a basis); obtuse when all
  v_i . v_j <= 0.  Conorms p_ij = -v_i . v_j (Å^2) in the order (01, 02, 03, 12, 13,
  23); root products r_ij = sqrt(p_ij) (Å).

Reduction (``selling_reduce``): a vectorised pairwise Gauss reduction first (each
pass subtracts the *rounded* multiple of one vector from another, so a skew of
10^k costs ~k passes instead of 10^k subtractive Selling steps), then Selling
steps (v_i -> -v_i, v_k -> v_k + v_i, v_l -> v_l + v_i on the largest positive
v_i . v_j) until every v_i . v_j <= max(1e-13 max|v|^2, 16 eps max|input row|^2).
The integer transformation is carried along and the vectors are recomputed from
the input after every pass, so rounding does not accumulate; the second bound is
the rounding floor of a skewed input, below which ties (zero conorms, |mu| = 1/2)
would otherwise cycle between equivalent superbases.  Loops run only on the
frames that still change.  Singular cells (|det| <= 1e-12 prod |b_i|), zero
vectors and non-finite entries raise ``LatticeError`` naming the frame.

Fano 7-vector (Conway-Sloane): the 7 non-zero classes of L/2L form a Fano plane,
and the Fano conorms of a lattice are the six conorms of any obtuse superbase
plus one 0 (the class of v0 = v1 + v2 + v3 mod 2), in the point order
100, 010, 001, 110, 101, 011, 111 <-> p01, p02, p03, p12, p13, p23, 0.  Relabelling
the classes (a change of basis) permutes these 7 points by one of the 168
elements of GL(3, 2); each zero of the 7-vector is one class of obtuse
superbases.  ``fano_roots`` = sqrt of the 7-vector, sorted ascending.

Canonical root products (``root_products``): over all obtuse superbases (every
zero of the 7-vector moved to the 7th point by GL(3, 2)) and all 24 index
permutations, the lexicographically smallest conorm 6-vector (p01, p02, p03, p12,
p13, p23), then square roots.  Comparisons use tie classes: the 7 Fano conorms
are sorted and consecutive values closer than 1e-9 x the largest form one class
(the class of 0 holds the zeros, i.e. the obtuse superbases); candidates are
ranked by class, which makes the choice transitive and vectorises as one small
matrix product.  Identical (to rounding) for isometric lattices.  It is a
display and record format only: a lexicographic choice jumps at near ties, so
distances never use it.

Lattice distance (``lattice_distance``, "fano7"): d(A, B) = min over g in
GL(3, 2) of |R7(A) - g R7(B)| (L2 or L-inf), R7 = sqrt of the Fano conorms.  The
group permutes coordinates, so d is a pseudometric (triangle inequality) and it
is 0 for isometric lattices; it is continuous everywhere, including across
zero-conorm walls where the six root products of one Selling superbase jump
(shared/math.md 2.3).  It is 1-Lipschitz in R7, hence Hölder-1/2 in the basis.

Distances to Bravais types (``distances``): the distance (same metric) from R7
to the closure of a type, i.e. to the union over GL(3, 2) of the pattern cones
{x_i = 0 on the zero class, x_i equal inside each class} of the type.  L2:
replace each class by its mean; L-inf: (max - min)/2 within a class and the
largest value of the zero class.  For each type T the cones are the *maximal*
zero/equality patterns among all patterns whose lattices are of type T or of a
type specialising T (``_PATTERNS`` below).  They come from an exhaustive
enumeration of the zero/equality patterns of the 7-vector (60 up to GL(3, 2),
57 non-degenerate), each realised with random values and typed by spglib on a
one-atom cell; ``tests/test_lattice3d.py`` repeats that derivation against
spglib and checks this table.  19 cones, 546 labelled patterns in total.  They
are the generic Delaunay sorts of each type; the measure-zero sorts listed in
shared/math.md 2.4 lie inside these cones and add nothing.  A cubic lattice is
at distance 0 from tP, oP, ... (closure); ``SPECIALISES`` is the containment
graph.  The nearest cone point is itself a lattice of the type (tested), so the
value is the exact infimum over lattices of the type, not a bound.

Scaling (tested): when a perturbation of size eps opens a zero conorm (e.g. a
shear of a right angle), root-space distances grow like sqrt(eps) (a 1e-8 shear
of a 4 Å cube is ~4e-4 Å from cP); when it moves only non-zero conorms they grow
like eps.  ``deformation`` grows like eps in both cases.

Deformation (``deformation``): the root-space distances grow like sqrt(strain)
near a zero conorm, so they are not comparable with spglib's ``symprec``
(shared/math.md 5).  ``deformation`` measures, in Å, how far the lattice is from
being mapped onto itself by the symmetry operations of the type, in the
quantities spglib's lattice test compares (lengths of basis vectors, and
angle x sqrt(l_i l_j) for pairs of them):

* coordinates: the lengths l(x) of the 7 coset-minimal vectors (l(x)^2 = the
  vonorm N(x) = sum of the 4 Fano conorms p(xi) with xi . x odd) and, for the 21
  coset pairs, a(x, y) = sqrt(l_x l_y) g(c / (l_x l_y)) with
  c = (N(x) + N(y) - N(x + y)) / 2 (the sum of the 2 Fano conorms odd on both:
  |dot product| of the minimal vectors) and g = arcsin on [0, 1/2], continued
  linearly (slope 2/sqrt3) so that a stays Lipschitz: a = (90 deg - angle) x
  sqrt(l_x l_y) for the pairs of a reduced basis;
* a setting of a type is one of its labelled patterns (the 546 relabellings of
  ``_PATTERNS``).  The relabellings that keep it are the setting's symmetry
  operations modulo 2L; they are generated by their involutions (of the 21
  involutions of GL(3, 2), each swaps 2 coset lengths and 8 pair angles).  An
  involution's discrepancy: the largest weighted difference of swapped lengths
  and of swapped angles, combined as the larger ("linf") or root-sum-square
  ("l2").  A right angle of the setting (a coset pair whose 2 conorms p(xi), p(eta)
  are zeros of the pattern) is flipped by a mirror: discrepancy 2 a(x, y), a from
  c = p(xi) + p(eta), which is |v(x) . v(y)| for the coset minima except on the three
  lines through the superbase's own zero (the seventh Fano point): there |v(x) . v(y)|
  = |p(xi) - p(eta)| (both identities tested on random superbases).  c overstated one of
  the three right angles of cF and of hR near alpha = 60 degrees (p01 + p23 for
  |p01 - p23|: up to 1.8x R on real relaxations toward fcc).  So when the line's third
  point xi + eta is a zero of the pattern too, a is taken from min(c, |p(xi) - p(eta)|
  + 2 p(xi + eta)): the exact |v(x) . v(y)| where that point is the superbase's zero,
  and a continuous bridge between the two identities where it is another zero of the
  pattern (the dot product itself jumps where the reduction changes superbase; the
  bridge also lowers some far-from-type deformations to oP, tP and cP, e.g. a Bain
  path's 1.9 to 1.3 Å, leaving the calibration near those types as it was).  It is
  invariant like c, and on a zero line the three flips vanish together only where its
  three conorms do.
  A setting whose
  only zero is at xi also counts p(xi) / max l (a guard: a non-zero conorm cannot
  serve as the superbase zero);
* weights: spglib compares only a reduced basis (the three shortest independent
  vectors), so a comparison counts fully when one side is in that frame:
  w(x) = min(1, lambda / l(x))^16, never below 1/2, with lambda = the third
  successive minimum (the second one for the coset on the line of the two
  shortest, which is not independent of them); a pair weighs w(x) w(y), a swap
  the larger weight of its two sides;
* deformation[T] = KAPPA x min over the settings of T of the largest discrepancy
  of an operation (involution or flip); KAPPA = 0.92 centres the ratio to
  spglib's critical symprec on 1.

It is 0 on the type and on every type it specialises (closure), positive
elsewhere; invariant under rotation, reflection, change of basis and relabelling
(a function of coset lengths and pair angles, minimised over all settings);
continuous, also across zero-conorm walls (the coordinates do not depend on the
obtuse superbase chosen) and where the frame changes (continuous weights);
Lipschitz in the basis: a change delta of the basis entries moves it by at most
(12 (sqrt(rho) + 1) + 200 D / l_min) delta (rho: aspect ratio of the coset
vectors; the second term comes from the weights and matters only far from the
type; the bound tested).

Calibration (``bench/calibrate_deformation.py``; docs/flags.md has the table):
R = deformation / (the smallest symprec at which spglib's lattice verdict on a
one-atom cell is the type or finer), for random cells of all 13 types with
aspect ratios up to 4 under random strains of 1e-5 .. 1e-2.  A shear of a right
angle or a stretch of one of two equal vectors gives R = KAPPA = 0.92 whatever
the aspect ratio (``metric="l2"``: 1.13 for the stretch, whose angles also
change).  Random cells: R stays within 0.5 .. 2 apart from single cells where
spglib itself is erratic (docs/flags.md).  spglib ignores angle changes below
1e-6 rad (``SIN_DTHETA2_CUTOFF``), so for smaller deformations R can be larger.
This is an agreement measured on random cells, not a guarantee: spglib's test
depends on its choice of basis and this measure does not.

Speed (one core, CPU time per 10^5 frames of random 4 Å cells, numpy 2.4 with
single-threaded OpenBLAS on a shared 2-core machine): ``selling_reduce`` 0.18 s,
``root_products`` 0.24 s, ``fano_roots`` 0.17 s (4-6 x 10^5 frames/s);
``distances`` (L2) 0.31 s, ``distances`` (L-inf) 0.60 s; ``deformation`` about
1.4x ``distances`` (L2) in either metric; ``invariants`` (superbase, root
products, Fano roots, 13 distances, 13 deformations, 6 systems from one
reduction) 0.5-0.8 s (L2; up to 1.3x what it was with the former deformation, measured
A/B in bench/README.md).
"""

from __future__ import annotations

import itertools
from functools import lru_cache

import numpy as np

from .errors import LatticeError

__all__ = [
    "KAPPA", "TYPES", "SYSTEMS", "SPECIALISES", "selling_reduce", "conorms", "fano_conorms",
    "root_products", "fano_roots", "distances", "deformation", "system_distances",
    "lattice_distance", "most_specific", "invariants", "deformation_and_size",
]

TYPES = ("mP", "mS", "oP", "oS", "oI", "oF", "tP", "tI", "hR", "hP", "cP", "cI", "cF")
"""The 13 non-triclinic 3D Bravais types (Pearson symbols); ``aP`` is triclinic."""

SPECIALISES = {
    "cP": ("tP", "hR"), "cI": ("tI", "hR"), "cF": ("tI", "hR"),
    "tP": ("oP", "oS"), "tI": ("oI", "oF"), "hP": ("oS",), "hR": ("mS",),
    "oP": ("mP",), "oS": ("mP", "mS"), "oI": ("mS",), "oF": ("mS",),
    "mP": ("aP",), "mS": ("aP",), "aP": (),
}
"""Direct containment: every lattice of the key type is also of each listed type
(the closure of the listed type contains the key type).  Transitive closure gives
all containments, e.g. cP is in tP, hR, oP, oS, mP, mS, aP; cP is not in tI."""

SYSTEMS = {
    "monoclinic": ("mP", "mS"),
    "orthorhombic": ("oP", "oS", "oI", "oF"),
    "tetragonal": ("tP", "tI"),
    "rhombohedral": ("hR",),
    "hexagonal": ("hP",),
    "cubic": ("cP", "cI", "cF"),
}
"""The six non-triclinic lattice systems and their Bravais types."""
_SYSTEM_COLS = np.array([[TYPES.index(ts[min(k, len(ts) - 1)]) for k in range(4)]
                         for ts in SYSTEMS.values()])   # (systems, 4) padded with the last type

_LEVEL = {"mP": 4, "mS": 4, "oP": 8, "oS": 8, "oI": 8, "oF": 8, "hR": 12,
          "tP": 16, "tI": 16, "hP": 24, "cP": 48, "cI": 48, "cF": 48}
"""Order of the holohedry (point group of the lattice) of each type."""

# Maximal conorm patterns of each type (see module docstring).  Names: the six
# superbase conorms "01".."23" and "*" for the seventh Fano point (the zero of
# the Selling superbase); "zero" lists the conorms that vanish besides "*",
# "eq" the classes of equal conorms; the rest are free.
_PATTERNS = {
    "mP": [("01 02", ())],
    "mS": [("", ("01 23", "02 13")), ("", ("01 02", "13 23")), ("01", ("02 03",))],
    "oP": [("01 02 12", ())],
    "oS": [("01 02", ("12 13",))],
    "oI": [("", ("01 23", "02 13", "03 12")), ("01", ("02 03", "12 13"))],
    "oF": [("", ("01 02 13 23",))],
    "tP": [("01 02 12", ("03 13",))],
    "tI": [("", ("01 02 13 23", "03 12")), ("01", ("02 03 12 13",))],
    "hR": [("", ("01 02 03", "12 13 23")), ("01 23", ("02 03 12",))],
    "hP": [("01 02", ("12 13 23",))],
    "cP": [("01 02 12", ("03 13 23",))],
    "cI": [("", ("01 02 03 12 13 23",))],
    "cF": [("01 23", ("02 03 12 13",))],
}
_NAMES = ("01", "02", "03", "12", "13", "23", "*")
_DIFF = tuple(itertools.combinations(range(7), 2))  # the 21 pairs of Fano points
_DI = np.array([i for i, _ in _DIFF])
_DJ = np.array([j for _, j in _DIFF])
_PAIRS = ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))
_FANO = ((1, 0, 0), (0, 1, 0), (0, 0, 1), (1, 1, 0), (1, 0, 1), (0, 1, 1), (1, 1, 1))

_SINGULAR = 1e-12   # |det| <= this * prod |b_i|: singular
_SELLING_TOL = 1e-13  # v_i.v_j > this * max|v|^2 triggers a Selling step
_LEX_TOL = 1e-9     # canonical form: conorm tie classes (fraction of the largest conorm)
_MAXIT = 2000
_EPS = np.finfo(float).eps
LENGTH_RANGE = (1e-50, 1e50)
"""Å. Cell vectors outside this range are refused (conorms and squared distances built from them
would underflow or overflow in double precision); every real cell is far inside."""
_CHUNK = 256  # frames per block in the cone distances (cache-sized)
_KEY_BLOCK = 4096  # frames per block when ranking the 168 relabellings (a 5.5 MB key table)
_REDUCE_BLOCK = 16384  # frames per block in the Selling reduction
_DEF_CHUNK = 192  # frames per block in ``deformation`` (its gathers stay in cache)
_GATHER_MAX = 64  # up to this many frames a superbase's dot products come from one gather
_FLAT_MAX = 8  # up to this many frames ``deformation`` reduces all index lists in one call
_W_SQUARINGS = 4  # frame weight (lambda / l)^16 = four squarings of lambda / l ...
_W_FLOOR = 0.5    # ... never below 1/2
KAPPA = 0.92
"""Calibration factor of ``deformation`` (unitless): deformation = KAPPA x the largest
discrepancy.  Chosen so that deformation / spglib's critical symprec is centred on 1 over
random cells of every type (``bench/calibrate_deformation.py``, docs/flags.md)."""


# ----------------------------------------------------------------------------- tables

@lru_cache(maxsize=None)
def _gl32():
    """(168, 7) int: the permutations of the 7 Fano points induced by GL(3, 2).

    Row g maps point k to point g[k]; a relabelled vector is ``x[..., g]``.
    """
    index = {p: i for i, p in enumerate(_FANO)}
    perms = set()
    for a, b, c, d, e, f, g, h, k in itertools.product((0, 1), repeat=9):   # rows (a b c), ...
        if (a * (e * k - f * h) - b * (d * k - f * g) + c * (d * h - e * g)) % 2 == 0:
            continue                         # singular over Z/2 (integer determinant, exact)
        perms.add(tuple(index[((a * x + b * y + c * z) % 2, (d * x + e * y + f * z) % 2,
                               (g * x + h * y + k * z) % 2)] for x, y, z in _FANO))
    out = np.array(sorted(perms), dtype=np.intp)
    assert out.shape == (168, 7)
    return out


def _parse(spec):
    zero, eqs = spec
    zs = {_NAMES.index(s) for s in zero.split()} | {6}
    blocks = [tuple(_NAMES.index(s) for s in e.split()) for e in eqs]
    return frozenset(zs), tuple(frozenset(b) for b in blocks)


@lru_cache(maxsize=None)
def _labelled_patterns():
    """(type index, zero set, classes) of every labelled pattern: each type's patterns under every
    relabelling of the 7 vectors by GL(3, Z/2), each distinct one once, types in ``TYPES`` order."""
    out = []
    g = _gl32().tolist()
    for t, specs in enumerate(_PATTERNS[k] for k in TYPES):
        seen = set()
        for spec in specs:
            z0, b0 = _parse(spec)
            for perm in g:
                z = frozenset(perm[i] for i in z0)
                b = frozenset(frozenset(perm[i] for i in blk) for blk in b0)
                if (z, b) not in seen:
                    seen.add((z, b))
                    out.append((t, z, b))
    return tuple(out)


@lru_cache(maxsize=None)
def _pattern_table():
    """All distinct GL(3, 2)-relabelled patterns of every type, as matrices and index tables.

    A labelled pattern k is a zero set Z_k and up to three classes B (>= 2 points)
    of equal coordinates.  Its squared L2 distance is sum_{Z_k} x_i^2 +
    sum_B (1/|B|) sum_{i<j in B} (x_i - x_j)^2: a non-negative combination of 28
    features, so one matrix product ``l2w @ features`` gives all K patterns without
    cancellation (exact zeros on the cone).  Its L-inf distance is the largest of
    max_{Z_k} x and (max_B - min_B)/2, computed once per distinct zero set and
    class and combined per pattern with row gathers.  Returns
      ``starts`` (13,) first labelled pattern of each type (patterns grouped by type);
      ``l2w``    (K, 28) L2 weights on [x_i^2 (7), (x_i - x_j)^2 (21, order _DIFF)];
      ``zidx, zstart`` / ``bidx, bstart``: flattened point lists of the distinct
                 zero sets / classes, for ``reduceat``;
      ``groups`` for L-inf: (feature rows (k, c), first index per type, types) for
                 the patterns with c = 1..4 parts.
    """
    labelled = _labelled_patterns()
    zero_list = sorted({z for _, z, _ in labelled}, key=sorted)
    block_list = sorted({blk for _, _, b in labelled for blk in b}, key=sorted)
    zindex = {z: i for i, z in enumerate(zero_list)}
    bindex = {blk: i for i, blk in enumerate(block_list)}
    nz, nb = len(zero_list), len(block_list)
    parts = np.full((len(labelled), 4), nz + nb, np.intp)
    for k, (_, z, b) in enumerate(labelled):
        parts[k, 0] = zindex[z]
        for m, blk in enumerate(sorted(b, key=sorted)):
            parts[k, 1 + m] = nz + bindex[blk]
    types = np.array([t for t, _, _ in labelled], dtype=np.intp)

    def flat(sets):
        idx = np.array([i for st in sets for i in sorted(st)], np.intp)
        size = np.array([len(st) for st in sets])
        return idx, np.concatenate([[0], np.cumsum(size)[:-1]]), size

    zidx, zstart, _ = flat(zero_list)
    bidx, bstart, _ = flat(block_list)
    # groups of patterns with the same number of parts (fewer gathers), sorted by type
    nparts = (parts < nz + nb).sum(axis=1)
    groups = []
    for c in range(1, 5):
        sel = np.flatnonzero(nparts == c)
        if len(sel):
            sel = sel[np.argsort(types[sel], kind="stable")]
            present, first = np.unique(types[sel], return_index=True)
            groups.append((parts[sel, :c], first, present))
    # L2: d_k^2 = sum_{i in Z_k} x_i^2 + sum_{B in k} (1/|B|) sum_{i<j in B} (x_i - x_j)^2,
    # a non-negative combination of the 28 features [x_i^2, (x_i - x_j)^2] (no cancellation)
    l2w = np.zeros((len(labelled), 7 + len(_DIFF)))
    for k, (_, z, b) in enumerate(labelled):
        l2w[k, list(z)] = 1.0
        for blk in b:
            for i, j in itertools.combinations(sorted(blk), 2):
                l2w[k, 7 + _DIFF.index((i, j))] += 1.0 / len(blk)
    return {"starts": np.searchsorted(types, np.arange(len(TYPES))), "l2w": l2w,
            "zidx": zidx, "zstart": zstart, "bidx": bidx, "bstart": bstart,
            "groups": groups}


@lru_cache(maxsize=None)
def _deform_table():
    """Index tables of ``deformation`` (definitions in its docstring).

    Cosets x (the 7 non-zero classes of L/2L) and Fano conorm points xi both carry the labels
    of ``_FANO``; xi pairs with x when xi . x is odd.  Coordinates: 7 coset lengths, then the
    21 coset pairs. ``swap``: for each of the 21 involutions of GL(3, 2), its 10 swapped coordinate
    pairs (2 lengths first, then 8 angles), as rows into [coordinates; weights]. A setting (labelled
    pattern) has a set of involutions (``subs``: rows of involution indices, grouped by size) and a
    zero structure (``zeros``: rows into the 49 flip rows, 0-20 the perpendicular pairs, 21-27 the
    single-zero guards, 28-48 the perpendicular pairs whose line lies in the zero set; ``shared``:
    each pair's 2 conorm points and the third point of their line). Settings of one type with the
    same involutions are grouped (``groups``: their zero structures; ``g_sub``: their involution
    set), sorted by type (``starts``). Each of ``zeros``, ``subs`` and ``groups`` is (lists grouped
    by length, one flat table): see ``_rows``.
    """
    dot = np.array([[sum(a * b for a, b in zip(xi, x)) % 2 for x in _FANO] for xi in _FANO])
    index = {p: i for i, p in enumerate(_FANO)}
    pairs = tuple(itertools.combinations(range(7), 2))
    pair_index = {pq: i for i, pq in enumerate(pairs)}
    shared = [frozenset(np.flatnonzero(dot[:, a] & dot[:, b])) for a, b in pairs]
    line3 = np.array([[index[tuple((np.array(_FANO[a]) + _FANO[b]) % 2)] if a != b else a
                       for b in range(7)] for a in range(7)])
    support = {frozenset(np.flatnonzero(dot[:, x])): x for x in range(7)}
    g = _gl32()
    involutions = [perm for perm in g if np.array_equal(perm[perm], np.arange(7))
                   and not np.array_equal(perm, np.arange(7))]
    sa, sb = [], []
    for perm in involutions:
        coset = [support[frozenset(int(perm[xi]) for xi in np.flatnonzero(dot[:, x]))]
                 for x in range(7)]
        move = coset + [7 + pair_index[tuple(sorted((coset[a], coset[b])))] for a, b in pairs]
        swaps = [(c, move[c]) for c in range(28) if move[c] > c]
        assert len(swaps) == 10 and swaps[1][0] < 7 <= swaps[2][0]   # 2 lengths, 8 angles
        sa += [c for c, _ in swaps]
        sb += [c for _, c in swaps]
    third = [index[tuple((np.array(_FANO[min(sh)]) + _FANO[max(sh)]) % 2)] for sh in shared]
    subsets, zeros, ps, pz, types = {}, {}, [], [], []
    as_lists = [q.tolist() for q in involutions]
    for t, z, b in _labelled_patterns():
        free = set(range(7)) - z - set().union(*b)
        inv = tuple(i for i, q in enumerate(as_lists)
                    if {q[j] for j in z} == z
                    and all({q[j] for j in blk} == blk for blk in b)
                    and all(q[j] == j for j in free))
        flips = tuple(i + 28 * (third[i] in z) for i, sh in enumerate(shared) if sh <= z)
        assert flips or len(z) == 1          # every zero is in a perpendicular pair
        key = flips if flips else (21 + min(z),)
        ps.append(subsets.setdefault(inv, len(subsets)))
        pz.append(zeros.setdefault(key, len(zeros)))
        types.append(t)

    def by_size(lists):  # [(positions, index rows)] of the non-empty lists grouped by length,
        out = {}             # and all of them as (positions, concatenated entries, starts)
        for i, lst in enumerate(lists):
            if lst:
                out.setdefault(len(lst), []).append(i)
        full = [x for x in lists if x]
        flat = (np.flatnonzero([len(x) > 0 for x in lists]), np.concatenate(full).astype(np.intp),
                np.cumsum([0] + [len(x) for x in full[:-1]]))
        grouped = [(np.array(v), np.array([lists[i] for i in v])) for _, v in sorted(out.items())]
        return grouped, flat

    sub_list = sorted(subsets, key=subsets.get)
    zero_list = sorted(zeros, key=zeros.get)
    # settings of one type with the same involutions differ only in their zero structure
    groups = {}
    for t, i, z in zip(types, ps, pz):
        groups.setdefault((t, i), []).append(z)
    keys = sorted(groups)
    return {"both": np.array([[xi in sh for xi in range(7)] for sh in shared], float),
            "shared": np.array([sorted(sh) + [third[i]] for i, sh in enumerate(shared)]).T,
            #         (3, 21): the pair's two conorm points and the third point of their line
            "pa": np.array([a for a, _ in pairs]), "pb": np.array([b for _, b in pairs]),
            "line3": line3, "swap": np.array([sa, sb, np.add(sa, 28), np.add(sb, 28)]),
            "n_zero": len(zero_list), "zeros": by_size(zero_list),
            "n_sub": len(sub_list), "subs": by_size(sub_list),
            "n_group": len(keys), "groups": by_size([groups[k] for k in keys]),
            "g_sub": np.array([i for _, i in keys]),
            "starts": np.searchsorted(np.array([t for t, _ in keys]), np.arange(len(TYPES)))}


# ----------------------------------------------------------------------------- input

def _frames(bases):
    try:
        arr = np.asarray(bases, dtype=float)
    except (TypeError, ValueError) as exc:
        raise LatticeError(f"3D bases must be numeric arrays of shape (n, 3, 3) or (3, 3): "
                           f"{exc}") from None
    if arr.shape == (3, 3):
        return arr[None], True
    if arr.ndim == 3 and arr.shape[1:] == (3, 3):
        return arr, False
    raise LatticeError(f"3D bases must have shape (n, 3, 3) or (3, 3), got {arr.shape}")


def _where(i, single):
    return "basis" if single else f"frame {i}"


def _validate(arr, single):
    """Raise LatticeError naming the first bad frame (non-finite, zero vector, singular)."""
    finite = np.isfinite(arr).all(axis=(1, 2))
    if not finite.all():
        i = int(np.flatnonzero(~finite)[0])
        raise LatticeError(f"{_where(i, single)}: cell contains non-finite numbers "
                           f"(NaN or inf): {arr[i].tolist()}")
    m = np.abs(arr).max(axis=2, keepdims=True)
    scaled = arr / np.where(m > 0, m, 1.0)
    with np.errstate(over="ignore"):   # the squares cannot overflow; a length beyond the double
        lengths = np.sqrt(np.einsum("nij,nij->ni", scaled, scaled)) * m[..., 0]   # range is inf
    zero = lengths == 0
    if zero.any():
        i, k = (int(v) for v in np.argwhere(zero)[0])
        raise LatticeError(f"{_where(i, single)}: cell vector {k} is zero: {arr[i].tolist()}")
    out = (lengths < LENGTH_RANGE[0]) | (lengths > LENGTH_RANGE[1])
    if out.any():
        i, k = (int(v) for v in np.argwhere(out)[0])
        raise LatticeError(f"{_where(i, single)}: cell vector {k} has length {lengths[i, k]:.3g} Å, "
                           f"outside {LENGTH_RANGE[0]:g}..{LENGTH_RANGE[1]:g} Å (squares of such "
                           f"lengths lose precision or overflow in double precision)")
    det = np.linalg.det(arr)
    bad = np.abs(det) <= _SINGULAR * lengths.prod(axis=1)
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise LatticeError(f"{_where(i, single)}: singular cell, vectors are coplanar "
                           f"(|det| = {abs(det[i]):.3g} Å^3): {arr[i].tolist()}")


# ----------------------------------------------------------------------------- reduction

_GAUSS_PAIRS = ((1, 0), (2, 0), (2, 1), (0, 1), (0, 2), (1, 2))


def _selling_steps():
    """(6, 4, 4) integer matrices of the Selling step at each pair (i, j)."""
    out = np.zeros((6, 4, 4))
    for s, (i, j) in enumerate(_PAIRS):
        t = np.eye(4)
        t[i, i] = -1.0
        for k in range(4):
            if k not in (i, j):
                t[k, i] = 1.0
        out[s] = t
    return out


_STEPS = _selling_steps()


_PI = np.array([i for i, _ in _PAIRS])
_PJ = np.array([j for _, j in _PAIRS])
_GI = np.array([i for i, _ in _GAUSS_PAIRS])
_GJ = np.array([j for _, j in _GAUSS_PAIRS])
_GAUSS_I, _GAUSS_J = np.r_[_GI, _GJ], np.r_[_GJ, _GJ]
_SIGNS = np.array([[1, 1], [1, -1], [-1, 1], [-1, -1]], float)
_EYE3 = np.eye(3)


def _pair_dots(v, i, j):
    """(n, k) v[:, i[k]] . v[:, j[k]]. A few frames: one gather and one einsum (per-call cost
    dominates); many: one einsum per pair on views (no copies of the vectors). Both sum the three
    products in the same order, so a frame gives the same bits alone or in a batch (tested)."""
    if v.shape[0] <= _GATHER_MAX:
        return np.einsum("nki,nki->nk", v[:, i], v[:, j])
    return np.stack([np.einsum("ni,ni->n", v[:, a], v[:, b]) for a, b in zip(i, j)], axis=1)


def _dots(v):
    """(n, 6) v_i . v_j for the pairs (01, 02, 03, 12, 13, 23)."""
    return _pair_dots(v, _PI, _PJ)


def _reduce(arr):
    """Obtuse superbase (n, 4, 3) of validated bases (n, 3, 3), in cache-sized blocks of frames
    (1.6x faster at 10^6 frames than one pass; every frame is reduced on its own either way)."""
    if arr.shape[0] <= _REDUCE_BLOCK:
        return _reduce_block(arr)
    return np.concatenate([_reduce_block(arr[s:s + _REDUCE_BLOCK], s)
                           for s in range(0, arr.shape[0], _REDUCE_BLOCK)])


def _reduce_block(arr, first=0):
    """Obtuse superbase (n, 4, 3) of validated bases (n, 3, 3); ``first``: index of frame 0.

    Rounding: vectors are recomputed from the exact integer transform, so a
    computed dot product is off by at most ~eps |input row|^2 (a skewed input is
    itself only that precise), plus the input's rounding carried by the transform:
    ~eps |U| |input row| |b| for a transform of entries |U| (only large for a basis
    far from reduced: rows of 10^3 |b| need |U| ~ 10^5).  Decisions (Gauss rounding
    at |mu| = 1/2, Selling step on v_i . v_j > 0) use that noise floor as a tie
    margin, so symmetric lattices (ties, zero conorms) cannot cycle between
    equivalent bases.
    """
    n = arr.shape[0]
    rows2 = np.einsum("nij,nij->ni", arr, arr).max(axis=1)
    noise = 16 * _EPS * rows2                                            # Å^2, per frame
    rows = np.sqrt(rows2)

    def carried(t, longest2, at):
        """Å^2: the input's rounding carried by the integer transforms ``t`` (m, k, 3) to
        vectors of frames ``at`` whose longest has squared length ``longest2``."""
        return 16 * _EPS * np.abs(t).sum(axis=2).max(axis=1) * rows[at] * np.sqrt(longest2)
    # (a transform large enough to matter takes many passes to build: the first few, all a
    # typical cell needs, skip the bound)
    U = np.repeat(_EYE3[None], n, axis=0)  # exact integers in float
    B = arr.copy()
    # a pass changes a frame only if some pair's |mu| exceeds 1/2 (the first pair of a pass sees
    # the frame unchanged, and so on): frames where none does, at the start, are skipped
    g = _pair_dots(arr, _GAUSS_I, _GAUSS_J)                  # (n, 12): b_i . b_j, then b_j . b_j
    idx = np.flatnonzero((np.abs(g[:, :6] / g[:, 6:]) > 0.5 + 1e-9 + noise[:, None] / g[:, 6:])
                         .any(axis=1))
    for it in range(_MAXIT):  # pairwise Gauss passes with rounding
        if not len(idx):
            break
        b, u = B[idx], U[idx]
        nz_ = noise[idx] if it < 8 else \
            noise[idx] + carried(u, np.einsum("mki,mki->mk", b, b).max(axis=1), idx)
        changed = np.zeros(len(idx), bool)
        for i, j in _GAUSS_PAIRS:
            bij, bj2 = _pair_dots(b, [i, j], [j, j]).T
            mu = bij / bj2
            # |mu| = 1/2 (a tie, common in symmetric cells) must not flip back and forth
            m = np.where(np.abs(mu) > 0.5 + 1e-9 + nz_ / bj2, np.rint(mu), 0.0)
            nz = m != 0
            if nz.any():
                u[:, i] -= m[:, None] * u[:, j]
                b[:, i] -= m[:, None] * b[:, j]
                changed |= nz
        if not changed.any():
            break
        U[idx] = u
        B[idx] = u @ arr[idx]
        idx = idx[changed]
    else:  # pragma: no cover - a strictly decreasing integer process
        raise LatticeError(f"frame {first + int(idx[0])}: basis reduction did not converge")
    # signs of b2, b3 minimising |b1 + b2 + b3|^2 = |v0|^2: the superbase of least
    # sum |v_i|^2 among the sign choices (what Selling steps decrease), so that
    # typical cells need zero or one step
    g = _pair_dots(B, [0, 0, 1], [1, 2, 2])                     # g12, g13, g23
    cost = g[:, :1] * _SIGNS[:, 0] + g[:, 1:2] * _SIGNS[:, 1] \
        + g[:, 2:] * (_SIGNS[:, 0] * _SIGNS[:, 1])
    best = _SIGNS[cost.argmin(axis=1)]
    U[:, 1] *= best[:, :1]
    U[:, 2] *= best[:, 1:]
    C = np.concatenate([-U.sum(axis=1, keepdims=True), U], axis=1)  # (n, 4, 3)
    V = C @ arr
    idx = np.arange(n)
    wide = np.abs(C).sum(axis=2).max(axis=1) > 64        # transforms whose rounding may matter
    for _ in range(_MAXIT):  # Selling steps
        v = V[idx]
        d = _dots(v)
        scale = np.einsum("nki,nki->nk", v, v).max(axis=1)
        k = d.argmax(axis=1)
        margin = noise[idx].copy()
        w = wide[idx]
        if w.any():
            margin[w] += carried(C[idx[w]], scale[w], idx[w])
        pos = d[np.arange(len(idx)), k] > np.maximum(_SELLING_TOL * scale, margin)
        if not pos.any():
            break
        idx, k = idx[pos], k[pos]
        C[idx] = _STEPS[k] @ C[idx]
        V[idx] = C[idx] @ arr[idx]
    else:  # pragma: no cover
        raise LatticeError(f"frame {first + int(idx[0])}: Selling reduction did not converge")
    return V


def _superbase(bases):
    """(superbase (n, 4, 3), conorms (n, 6), single). A conorm within the rounding of its dot
    product (16 eps max|v_i|^2) is 0: a lattice of a type, in any orientation or basis, has its
    zero conorms exactly 0, so its root-space distance to the type is 0, not ~1e-8 |v|."""
    arr, single = _frames(bases)
    _validate(arr, single)
    v = _reduce(arr)
    p = -_dots(v)
    floor = 16 * _EPS * np.einsum("nij,nij->ni", v, v).max(axis=1, keepdims=True)
    return v, np.where(p > floor, p, 0.0), single


def _out(x, single):
    return x[0] if single else x


def _p7(p6):
    return np.concatenate([p6, np.zeros((p6.shape[0], 1))], axis=1)


def selling_reduce(bases):
    """Obtuse superbase (n, 4, 3) Å: rows v0..v3, sum 0, all v_i . v_j <= 0.

    "<= 0" holds to max(1e-13 max|v|^2, 16 eps max|input row|^2), the rounding
    floor of the input (module docstring).

    v1, v2, v3 form a basis of the same lattice (a unimodular transform of the
    input rows).  Raises LatticeError for singular or non-finite cells.
    """
    arr, single = _frames(bases)
    _validate(arr, single)
    return _out(_reduce(arr), single)


def conorms(bases):
    """Conorms (n, 6) Å^2 of the Selling superbase, order (01, 02, 03, 12, 13, 23), >= 0.

    Not canonical (depends on the superbase's labelling); see ``root_products``.
    """
    _, p, single = _superbase(bases)
    return _out(p, single)


def fano_conorms(bases):
    """Fano conorm 7-vector (n, 7) Å^2, sorted ascending (smallest is 0)."""
    _, p, single = _superbase(bases)
    return _out(np.sort(_p7(p), axis=1), single)


def fano_roots(bases):
    """Root Fano 7-vector (n, 7) Å: sqrt of the Fano conorms, sorted ascending."""
    _, p, single = _superbase(bases)
    return _out(np.sqrt(np.sort(_p7(p), axis=1)), single)


@lru_cache(maxsize=None)
def _key_matrix():
    """(7, 168) weights: ranks (n, 7) @ M = lexicographic key of every relabelling.

    Relabelling g reads the 6 conorms x[g[0]], ..., x[g[5]] (p01 .. p23) with x[g[6]]
    as the superbase's zero.  Key = 8^6 rank(x[g[6]]) + sum_c 8^(5-c) rank(x[g[c]]):
    ranks are < 8, so comparing keys is comparing (zero first, then p01, ..., p23)
    lexicographically, and a relabelling whose "*" is not a zero (rank > 0) loses.
    """
    g = _gl32()
    m = np.zeros((7, len(g)))
    for k, perm in enumerate(g):
        for c in range(6):
            m[perm[c], k] = 8.0 ** (5 - c)
        m[perm[6], k] = 8.0 ** 6
    return m


def _canonical(p6):
    """Canonical conorm 6-vectors (n, 6) (see ``root_products``)."""
    n = p6.shape[0]
    x = _p7(p6)
    # tie classes: sorted values closer than _LEX_TOL * max are equal; rank = class index
    order = np.argsort(x, axis=1, kind="stable")
    row = np.arange(n)[:, None]
    xs = x[row, order]
    gap = xs[:, 1:] - xs[:, :-1] > (_LEX_TOL * xs[:, -1])[:, None]
    rank_sorted = np.zeros((n, 7))
    np.cumsum(gap, axis=1, out=rank_sorted[:, 1:])
    rank = np.empty_like(rank_sorted)
    rank[row, order] = rank_sorted
    key = _key_matrix()  # keys are exact integers < 8^7
    # in blocks: a (n, 168) key table is memory-bound (1.3 GB at 10^6 frames; 3.4 s -> 0.2 s)
    best = np.concatenate([(rank[s:s + _KEY_BLOCK] @ key).argmin(axis=1)
                           for s in range(0, n, _KEY_BLOCK)]) if n else np.zeros(0, np.intp)
    return x[row, _gl32()[best][:, :6]]


def root_products(bases):
    """Canonical root products (n, 6) Å: (r01, r02, r03, r12, r13, r23).

    The lexicographically smallest conorm 6-vector over all obtuse superbases
    and all 24 index permutations, then square roots.  Comparisons use tie
    classes: the 7 Fano conorms are sorted and consecutive values closer than
    1e-9 x the largest are one class (the class of 0 are the zeros, i.e. the
    obtuse superbases); candidates are ordered by class, not by raw value.
    Same value for isometric lattices; for display and records (it jumps at near
    ties; distances never use it).  E.g. a cube of edge a gives (0, 0, a, 0, a, a).
    """
    _, p, single = _superbase(bases)
    return _out(np.sqrt(_canonical(p)), single)


# ----------------------------------------------------------------------------- distances

def _check_metric(metric):
    if metric not in ("l2", "linf"):
        raise ValueError(f"metric must be 'l2' or 'linf', got {metric!r}")


def _cone(x, metric):
    """(n, 13) distance (L2 or L-inf) from 7-vectors x (n, 7), x >= 0, to each type's closure.

    L2: one (K, 28) @ (28, m) product per block of frames, then the minimum over each type's rows
    (row minima: 1.6x faster than ``minimum.reduceat`` along the rows of a full block). A block's frame count is
    padded to a multiple of 8 so every frame goes through the same matrix-product kernel: a lone
    frame would otherwise take BLAS's matrix-vector path and differ in the last bit from the same
    frame in a batch (the live tracker computes one new frame at a time)."""
    tab = _pattern_table()
    out = np.empty((x.shape[0], len(TYPES)))
    for s in range(0, x.shape[0], _CHUNK):
        xt = np.ascontiguousarray(x[s:s + _CHUNK].T)  # (7, m): rows are gathered
        m = xt.shape[1]
        if metric == "l2":
            if m % 8:
                xt = np.concatenate([xt, np.zeros((7, 8 - m % 8))], axis=1)
            di = xt[_DI] - xt[_DJ]
            feat = np.concatenate([xt * xt, di * di], axis=0)  # (28, m padded)
            prod = tab["l2w"] @ feat
            if m < 64:      # (few frames: one call beats 13)
                best = np.minimum.reduceat(prod, tab["starts"], axis=0)[:, :m]
            else:
                best = np.empty((len(TYPES), prod.shape[1]))
                ends = np.append(tab["starts"][1:], tab["l2w"].shape[0])
                for t, (a, b) in enumerate(zip(tab["starts"], ends)):
                    np.min(prod[a:b], axis=0, out=best[t])
                best = best[:, :m]
        else:
            zv, bv = xt[tab["zidx"]], xt[tab["bidx"]]
            zf = np.maximum.reduceat(zv, tab["zstart"], axis=0)
            bf = (np.maximum.reduceat(bv, tab["bstart"], axis=0)
                  - np.minimum.reduceat(bv, tab["bstart"], axis=0)) / 2.0
            feat = np.concatenate([zf, bf], axis=0)
            best = np.full((len(TYPES), m), np.inf)
            for parts, first, present in tab["groups"]:
                dk = feat[parts[:, 0]]
                for c in range(1, parts.shape[1]):
                    np.maximum(dk, feat[parts[:, c]], out=dk)
                best[present] = np.minimum(best[present],
                                           np.minimum.reduceat(dk, first, axis=0))
        out[s:s + _CHUNK] = (np.sqrt(best) if metric == "l2" else best).T
    return out


def _type_dict(d, single):
    return {t: _out(d[:, i], single) for i, t in enumerate(TYPES)}


def _system_dict(d, single):
    m = d[:, _SYSTEM_COLS].min(axis=2)       # (n, systems): the nearest type of each system
    return {s: _out(m[:, k], single) for k, s in enumerate(SYSTEMS)}


def _deformation(v, p, metric):
    """(n, 13) deformation (Å) of obtuse superbases v (n, 4, 3) with conorms p (n, 6)."""
    x = _p7(p)
    # the 7 coset minima v1, v2, v3, v1+v2, v1+v3, v2+v3, v0 (order of _FANO); their lengths
    # are taken from the vectors, not as sums of conorms, which rounding can zero at
    # extreme aspect ratios
    w = np.stack([v[:, 1], v[:, 2], v[:, 3], v[:, 1] + v[:, 2], v[:, 1] + v[:, 3],
                  v[:, 2] + v[:, 3], v[:, 0]], axis=1)
    n2 = np.einsum("nki,nki->nk", w, w)
    out = np.empty((x.shape[0], len(TYPES)))
    for s in range(0, x.shape[0], _DEF_CHUNK):
        out[s:s + _DEF_CHUNK] = _discrepancy(np.ascontiguousarray(x[s:s + _DEF_CHUNK].T),
                                             np.ascontiguousarray(n2[s:s + _DEF_CHUNK].T),
                                             metric).T
    return out


def _rows(x, table, n, reduce):
    """(n, m) ``reduce`` (np.maximum or np.minimum) of the rows of ``x`` (k, m) listed by each
    output row of ``table`` (:func:`_deform_table`'s index lists; an empty list gives 0). A few
    frames take one gather of all lists and ``reduceat`` (the per-call cost dominates); many take
    the lists grouped by length, one gather per length (faster on large blocks). Same values."""
    out = np.zeros((n, x.shape[1]))
    groups, (ids, flat, starts) = table
    if x.shape[1] <= _FLAT_MAX:
        out[ids] = reduce.reduceat(x[flat], starts, axis=0)
    else:
        for ids, rows in groups:
            out[ids] = reduce.reduce(x[rows], axis=1)
    return out


def _angle(c, s):
    """Pair angle coordinate a (Å) from |dot product| c (Å^2) and s = sqrt(l_x l_y) (Å):
    s x arcsin of |cos| = c / s^2 on [0, 1/2], continued linearly (slope 2/sqrt3) above."""
    t = c / (s * s)
    return (np.arcsin(np.minimum(t, 0.5)) + np.maximum(t - 0.5, 0.0) * (2 / np.sqrt(3))) * s


def _discrepancy(pt, nt, metric):
    """KAPPA x the symmetry discrepancy (Å) for each type, (13, m), of Fano conorms pt (7, m)
    with coset vonorms nt (7, m) (Å^2)."""
    tab = _deform_table()
    m = pt.shape[1]
    length = np.sqrt(nt)                                      # (7, m) coset lengths, Å
    root = np.sqrt(length)
    s = root[tab["pa"]] * root[tab["pb"]]                     # (21, m) sqrt(l_x l_y)
    angle = _angle(tab["both"] @ pt, s)
    # frame weights: 1 up to the third successive minimum (the second one for the coset on
    # the line of the two shortest), then (lambda / l)^16, never below 1/2
    cols = np.arange(m)
    masked = length.copy()
    first = masked.argmin(axis=0)
    masked[first, cols] = np.inf
    second = masked.argmin(axis=0)
    lam2 = masked[second, cols]
    on_line = tab["line3"][first, second]
    masked[second, cols] = masked[on_line, cols] = np.inf
    lam = masked.min(axis=0)[None].repeat(7, axis=0)
    lam[on_line, cols] = lam2
    w = np.minimum(1.0, lam / length)
    for _ in range(_W_SQUARINGS):                             # (lambda / l)^16
        w = w * w
    w = np.maximum(_W_FLOOR, w)
    wp = w[tab["pa"]] * w[tab["pb"]]
    both = np.concatenate([length, angle, w, wp])[tab["swap"]]   # (4, 210, m): a, b, w_a, w_b
    d = (np.abs(both[0] - both[1]) * np.maximum(both[2], both[3])).reshape(21, 10, m)
    d_len, d_ang = d[:, :2].max(axis=1), d[:, 2:].max(axis=1)
    worst = np.maximum(d_len, d_ang) if metric == "linf" else np.sqrt(d_len ** 2 + d_ang ** 2)
    pa, pb, pc = pt[tab["shared"][0]], pt[tab["shared"][1]], pt[tab["shared"][2]]
    right = _angle(np.minimum(pa + pb, np.abs(pa - pb) + 2.0 * pc), s)   # |dot| of the minima
    flips = np.concatenate([2.0 * wp * angle, pt / length.max(axis=0), 2.0 * wp * right])  # (49, m)
    zero = _rows(flips, tab["zeros"], tab["n_zero"], np.maximum)   # zero structures: largest flip
    sub = _rows(worst, tab["subs"], tab["n_sub"], np.maximum)      # involution sets: the worst
    zmin = _rows(zero, tab["groups"], tab["n_group"], np.minimum)  # settings of a type, same
    #                                                                involutions: the best
    return KAPPA * np.minimum.reduceat(np.maximum(sub[tab["g_sub"]], zmin), tab["starts"], axis=0)


def distances(bases, metric="l2"):
    """Distance (Å) from each lattice to the closure of each type, dict ``TYPES`` -> (n,).

    Pattern-cone projection of the root Fano 7-vector (module docstring), L2 or
    L-inf ("linf").  0 for lattices of the type and of every type specialising it;
    continuous everywhere, but Hölder-1/2 near a zero conorm (a strain eps moves
    a zero root product by ~sqrt(eps)); compare ``deformation`` with symprec.
    """
    _check_metric(metric)
    _, p, single = _superbase(bases)
    return _type_dict(_cone(np.sqrt(_p7(p)), metric), single)


def deformation(bases, metric="l2"):
    """Lipschitz deformation measure (Å), dict ``TYPES`` -> (n,).

    KAPPA x the smallest, over the settings of the type, largest discrepancy
    between the lattice and its images under the setting's symmetry operations,
    in coset-vector lengths and pair angles x sqrt(l_i l_j) (Å; definition in the
    module docstring).  Per operation the length and angle discrepancies combine
    as the larger ("linf") or in quadrature ("l2").  0 on the type and its
    closure; comparable with spglib's ``symprec`` (ratio within about 0.5 .. 2,
    docs/flags.md).
    """
    _check_metric(metric)
    v, p, single = _superbase(bases)
    return _type_dict(_deformation(v, p, metric), single)


def deformation_and_size(bases, metric="l2"):
    """:func:`deformation` and the lattice's size (Å, (n,)) from one Selling reduction. The size
    is sqrt of the sum of the six conorms, sqrt((|v0|^2 + ... + |v3|^2) / 2) of the obtuse
    superbase: invariant under rotation, reflection and change of basis, proportional to a uniform
    scaling (what makes the deformation's changes comparable across a cell that shrinks)."""
    _check_metric(metric)
    v, p, single = _superbase(bases)
    return _type_dict(_deformation(v, p, metric), single), _out(np.sqrt(p.sum(axis=1)), single)


def system_distances(bases, metric="l2"):
    """Distance (Å) to each lattice system (min over its types), dict ``SYSTEMS`` -> (n,)."""
    _check_metric(metric)
    _, p, single = _superbase(bases)
    return _system_dict(_cone(np.sqrt(_p7(p)), metric), single)


def invariants(bases, metric="l2"):
    """Everything per frame from one Selling reduction (the fast path for trajectories).

    Returns a dict: ``superbase`` (n, 4, 3) Å, ``root_products`` (n, 6) Å (canonical),
    ``fano_roots`` (n, 7) Å, ``distance`` / ``deformation`` (dicts keyed by
    ``TYPES``, Å) and ``systems`` (dict keyed by ``SYSTEMS``, Å), identical to the
    separate functions.
    """
    _check_metric(metric)
    v, p, single = _superbase(bases)
    d = _cone(np.sqrt(_p7(p)), metric)
    return {"superbase": _out(v, single),
            "root_products": _out(np.sqrt(_canonical(p)), single),
            "fano_roots": _out(np.sqrt(np.sort(_p7(p), axis=1)), single),
            "distance": _type_dict(d, single),
            "deformation": _type_dict(_deformation(v, p, metric), single),
            "systems": _system_dict(d, single)}


def lattice_distance(a, b, metric="l2"):
    """fano7 distance (Å) between lattices ``a`` and ``b``, broadcast over frames.

    min over the 168 relabellings g of GL(3, 2) of |R7(a) - g R7(b)| (L2 or L-inf).
    A pseudometric: symmetric, triangle inequality, 0 for isometric lattices;
    continuous across zero-conorm walls.  Scalar for two single bases.
    """
    _check_metric(metric)
    _, pa, sa = _superbase(a)
    _, pb, sb = _superbase(b)
    if pa.shape[0] != pb.shape[0] and 1 not in (pa.shape[0], pb.shape[0]):
        raise ValueError(f"cannot broadcast {pa.shape[0]} frames against {pb.shape[0]}")
    n = max(pa.shape[0], pb.shape[0])
    x = np.broadcast_to(np.sqrt(_p7(pa)), (n, 7))
    y = np.broadcast_to(np.sqrt(_p7(pb)), (n, 7))
    g = _gl32()
    out = np.empty(n)
    for s in range(0, n, _CHUNK):
        yc = y[s:s + _CHUNK][:, g]  # (m, 168, 7)
        diff = x[s:s + _CHUNK][:, None, :] - yc
        if metric == "l2":
            out[s:s + _CHUNK] = np.sqrt(np.einsum("mgi,mgi->mg", diff, diff).min(axis=1))
        else:
            out[s:s + _CHUNK] = np.abs(diff).max(axis=2).min(axis=1)
    return float(out[0]) if (sa and sb) else out


def most_specific(dist, tol):
    """Most specific type whose distance is <= ``tol`` (units of ``dist``), else ``"aP"``.

    ``dist`` is a dict keyed by ``TYPES`` (scalars or (n,) arrays), as from
    ``distances`` or ``deformation``.  Types are ranked by the order of their
    holohedry (cubic 48 > hP 24 > tetragonal 16 > hR 12 > orthorhombic 8 >
    monoclinic 4); within a rank the smaller distance wins.  Returns a str for
    scalar input, else an (n,) array of str.
    """
    d = {k: np.asarray(dist[k], dtype=float) for k in TYPES}
    tol = np.asarray(tol, dtype=float)
    shape = np.broadcast_shapes(tol.shape, *(v.shape for v in d.values()))
    out = np.full(shape, "aP", dtype="<U2")
    for level in sorted(set(_LEVEL.values())):  # more specific levels override
        best = np.full(shape, np.inf)
        name = np.full(shape, "", dtype="<U2")
        for k in (t for t in TYPES if _LEVEL[t] == level):
            v = np.broadcast_to(d[k], shape)
            take = (v <= tol) & (v < best)
            best = np.where(take, v, best)
            name = np.where(take, k, name)
        out = np.where(name != "", name, out)
    return str(out) if out.ndim == 0 else out
