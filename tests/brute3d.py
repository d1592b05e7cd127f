"""Independent brute-force references for the 3D lattice tests (slow, simple, no driftwatch).

Nothing here imports driftwatch: the lattice vectors are enumerated inside a
rigorous coefficient box, the Fano plane group is built as the collineations
of the 7 points (line-preserving permutations, not from matrices), and the
cone distances are explicit projections.  spglib is used only as the external
symmetry reference (one-atom cell).
"""

from __future__ import annotations

import itertools

import numpy as np
import spglib

PAIRS = ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))
# Fano points as coset labels (coefficients mod 2); order matches p01..p23, 0
FANO = ((1, 0, 0), (0, 1, 0), (0, 0, 1), (1, 1, 0), (1, 0, 1), (0, 1, 1), (1, 1, 1))


# ----------------------------------------------------------------------------- lattice vectors

def lll(basis, delta=0.75):
    """Textbook LLL reduction of the rows (scalar loops)."""
    b = [np.array(r, float) for r in basis]
    n = len(b)

    def gso(b):
        bs, mu = [], np.zeros((n, n))
        for i in range(n):
            v = b[i].copy()
            for j in range(i):
                mu[i, j] = b[i] @ bs[j] / (bs[j] @ bs[j])
                v -= mu[i, j] * bs[j]
            bs.append(v)
        return bs, mu

    k = 1
    while k < n:
        for j in range(k - 1, -1, -1):
            _, mu = gso(b)
            q = round(mu[k, j])
            if q:
                b[k] = b[k] - q * b[j]
        bs, mu = gso(b)
        if bs[k] @ bs[k] >= (delta - mu[k, k - 1] ** 2) * (bs[k - 1] @ bs[k - 1]):
            k += 1
        else:
            b[k], b[k - 1] = b[k - 1], b[k]
            k = max(k - 1, 1)
    return np.array(b)


def short_vectors(basis, bound):
    """All lattice vectors w != 0 with |w|^2 <= bound: (coefficients (m, 3), vectors (m, 3)).

    Coefficients n_i = w . d_i with d_i the dual basis, so |n_i| <= sqrt(bound) |d_i|.
    """
    b = np.asarray(basis, float)
    dual = np.linalg.inv(b).T
    r = [int(np.floor(np.sqrt(bound) * np.linalg.norm(d) + 1e-9)) for d in dual]
    grid = np.array(list(itertools.product(*[range(-k, k + 1) for k in r])), float)
    w = grid @ b
    keep = (np.einsum("ij,ij->i", w, w) <= bound * (1 + 1e-12)) & (np.abs(grid).sum(1) > 0)
    return grid[keep].astype(int), w[keep]


def vonorms(basis):
    """The 7 vonorms N(x) = min |w|^2 over the coset x of L/2L (order FANO), Å^2."""
    b = lll(basis)
    # an upper bound for every coset minimum: the norm of one element of each coset
    bound = max(float(np.dot(np.array(x) @ b, np.array(x) @ b)) for x in FANO)
    coef, w = short_vectors(b, bound)
    n2 = np.einsum("ij,ij->i", w, w)
    out = []
    for x in FANO:
        m = np.all((coef - np.array(x)) % 2 == 0, axis=1)
        out.append(n2[m].min())
    return np.array(out)


def fano_conorms(basis):
    """Fano conorms p(xi) = -1/4 sum_x (-1)^{xi.x} N(x) (sum over all x incl. 0), order FANO."""
    N = vonorms(basis)
    pts = np.array(FANO)
    return np.array([-0.25 * sum((-1) ** int(np.dot(xi, x) % 2) * N[k] for k, x in enumerate(pts))
                     for xi in pts])


def obtuse_superbases(basis, tol=1e-9):
    """All obtuse superbases (v0..v3) up to a global sign: list of (4, 3) arrays.

    Enumerates triples of lattice vectors no longer than the largest vonorm,
    keeps those forming a basis (|det| of coefficients = 1) with all six
    v_i . v_j <= tol * scale, v0 = -(v1 + v2 + v3).
    """
    b = lll(basis)
    scale = max(np.einsum("ij,ij->i", b, b))
    bound = vonorms(b).max() * (1 + 1e-9)
    coef, w = short_vectors(b, bound)
    found = []
    keys = set()
    idx = range(len(w))
    for i, j, k in itertools.combinations(idx, 3):
        if abs(round(np.linalg.det(coef[[i, j, k]]))) != 1:
            continue
        for si, sj, sk in itertools.product((1, -1), repeat=3):
            v = np.array([-(si * w[i] + sj * w[j] + sk * w[k]), si * w[i], sj * w[j], sk * w[k]])
            if v[0] @ v[0] > bound:
                continue
            if all(v[a] @ v[c] <= tol * scale for a, c in PAIRS):
                key = frozenset(tuple(np.round(x, 6)) for x in v)
                neg = frozenset(tuple(np.round(-x, 6)) for x in v)
                if key not in keys and neg not in keys:
                    keys.add(key)
                    found.append(v)
    return found


def conorms6(sb):
    return np.array([-sb[i] @ sb[j] for i, j in PAIRS])


# ----------------------------------------------------------------------------- groups

def fano_collineations():
    """The permutations of the 7 Fano points that map lines to lines (168 of them)."""
    pts = [np.array(p) for p in FANO]
    lines = set()
    for a, b in itertools.combinations(range(7), 2):
        c = FANO.index(tuple((pts[a] + pts[b]) % 2))
        lines.add(frozenset((a, b, c)))
    out = []
    for perm in itertools.permutations(range(7)):
        if all(frozenset(perm[i] for i in ln) in lines for ln in lines):
            out.append(perm)
    return np.array(out)


def s4_on_edges():
    """The 24 vertex permutations of K4 acting on the 6 edges (order PAIRS)."""
    out = []
    for s in itertools.permutations(range(4)):
        out.append([PAIRS.index(tuple(sorted((s[i], s[j])))) for i, j in PAIRS])
    return np.array(out)


def root6_distance(a, b):
    """root6 distance (L2): min over all obtuse superbases of a and b and S4 of |r(a) - s r(b)|."""
    ra = [np.sqrt(np.maximum(conorms6(s), 0)) for s in obtuse_superbases(a)]
    rb = [np.sqrt(np.maximum(conorms6(s), 0)) for s in obtuse_superbases(b)]
    perms = s4_on_edges()
    return min(np.linalg.norm(x - y[p]) for x in ra for y in rb for p in perms)


def fano7_distance(a, b, metric="l2"):
    """min over the collineations g of |R7(a) - g R7(b)| with R7 from the vonorms."""
    x = np.sqrt(np.maximum(fano_conorms(a), 0))
    y = np.sqrt(np.maximum(fano_conorms(b), 0))
    d = [x - y[g] for g in fano_collineations()]
    return min(np.linalg.norm(v) if metric == "l2" else np.abs(v).max() for v in d)


# ----------------------------------------------------------------------------- patterns

def project(x, zero, blocks, metric="l2"):
    """Nearest point of the cone {x_zero = 0, equal inside each block} and the distance."""
    y = np.array(x, float)
    y[list(zero)] = 0.0
    for blk in blocks:
        y[list(blk)] = np.mean(x[list(blk)]) if metric == "l2" else \
            (np.max(x[list(blk)]) + np.min(x[list(blk)])) / 2
    d = np.linalg.norm(x - y) if metric == "l2" else np.abs(x - y).max()
    return d, y


def cone_distance(x, patterns, metric="l2"):
    """min over patterns (zero, blocks) and collineations of the projection distance."""
    best = (np.inf, None)
    for g in fano_collineations():
        for zero, blocks in patterns:
            z = [g[i] for i in zero]
            bl = [[g[i] for i in blk] for blk in blocks]
            d, y = project(x, z, bl, metric)
            if d < best[0]:
                best = (d, y)
    return best


def basis_from_fano(x7):
    """A basis (rows) of a lattice whose Fano conorm vector is x7 (>= 0, with a zero)."""
    x7 = np.asarray(x7, float)
    z = int(np.argmin(x7))
    g = next(g for g in fano_collineations() if g[6] == z)
    p = x7[list(g)][:6]
    return basis_from_conorms(p)


def basis_from_conorms(p):
    """Basis v1, v2, v3 (rows) of the superbase with conorms p (01, 02, 03, 12, 13, 23)."""
    p01, p02, p03, p12, p13, p23 = p
    gram = np.array([[p01 + p12 + p13, -p12, -p13],
                     [-p12, p02 + p12 + p23, -p23],
                     [-p13, -p23, p03 + p13 + p23]])
    return np.linalg.cholesky(gram)


# ----------------------------------------------------------------------------- symmetry references

def pearson(basis, symprec=1e-5):
    """Bravais type (Pearson symbol) of the lattice by spglib on a one-atom cell; None where spglib
    finds none (it returns None, or raises once ASE's symmetry code has set
    SPGLIB_OLD_ERROR_HANDLING=false for the process)."""
    try:
        ds = spglib.get_symmetry_dataset((np.asarray(basis, float), [[0, 0, 0]], [1]),
                                         symprec=symprec)
    except spglib.error.SpglibError:
        return None
    if ds is None:
        return None
    num, c = ds.number, ds.international[0]
    system = ("a" if num <= 2 else "m" if num <= 15 else "o" if num <= 74 else
              "t" if num <= 142 else "h" if num <= 194 else "c")
    return system + ("S" if c in "ABC" else c)


def point_group_order(basis, tol=1e-6):
    """Number of integer matrices M with M G M^T = G (brute force over short vectors)."""
    b = lll(basis)
    g = b @ b.T
    n2 = np.diag(g)
    coef, w = short_vectors(b, n2.max() * (1 + 1e-9))
    cand = [coef[np.abs(np.einsum("ij,ij->i", w, w) - n2[i]) <= tol * n2.max()] for i in range(3)]
    count = 0
    for r0 in cand[0]:
        for r1 in cand[1]:
            for r2 in cand[2]:
                m = np.array([r0, r1, r2], float)
                if abs(abs(np.linalg.det(m)) - 1) > 1e-9:
                    continue
                if np.allclose(m @ g @ m.T, g, atol=tol * n2.max()):
                    count += 1
    return count


# ------------------------------------------------------------------------- random Bravais lattices

def _distinct(rng, k, lo=2.5, hi=6.0, gap=0.25):
    while True:
        v = np.sort(rng.uniform(lo, hi, k))
        if k == 1 or np.min(np.diff(v)) > gap:
            return rng.permutation(v)


def random_lattice(kind, rng):
    """A primitive basis (rows, Å) of a random lattice of Bravais type ``kind``.

    Conventional cells with the metric conditions of International Tables Vol. A
    (cubic a = b = c, tetragonal a = b, orthorhombic a, b, c distinct, hexagonal
    a = b, gamma = 120, monoclinic unique axis b, beta != 90), converted with the
    usual centring vectors (I: (-1,1,1)/2 ..., F: (0,1,1)/2 ..., C: (a -+ b)/2,
    R: obverse rhombohedral vectors in the hexagonal cell).  Parameters are drawn
    away from accidental higher symmetry; the tests confirm each type with spglib.
    """
    s, c = kind[0], kind[1]
    if s == "c":
        a = b = cc = _distinct(rng, 1)[0]
    elif s in "th":
        while True:
            a, cc = _distinct(rng, 2)
            r = cc / a
            # avoid accidental cubic cells of tI / hR (c/a = sqrt2, 1/sqrt2, sqrt6, ...)
            if min(abs(r - q) for q in (1, np.sqrt(2), 1 / np.sqrt(2), np.sqrt(6),
                                        np.sqrt(1.5), np.sqrt(3 / 8))) > 0.05:
                break
        b = a
    else:
        a, b, cc = _distinct(rng, 3)
    if s == "h":
        conv = np.array([[a, 0, 0], [-a / 2, a * np.sqrt(3) / 2, 0], [0, 0, cc]])
    elif s == "m":
        beta = np.radians(rng.uniform(97, 125))
        conv = np.array([[a, 0, 0], [0, b, 0], [cc * np.cos(beta), 0, cc * np.sin(beta)]])
    elif s == "a":
        while True:
            conv = np.diag([a, b, cc]) + rng.uniform(-0.8, 0.8, (3, 3))
            if abs(np.linalg.det(conv)) > 5:
                return conv
    else:
        conv = np.diag([a, b, cc])
    if c == "P":
        return conv
    m = {"I": [[-.5, .5, .5], [.5, -.5, .5], [.5, .5, -.5]],
         "F": [[0, .5, .5], [.5, 0, .5], [.5, .5, 0]],
         "S": [[.5, -.5, 0], [.5, .5, 0], [0, 0, 1]],
         "R": [[2 / 3, 1 / 3, 1 / 3], [-1 / 3, 1 / 3, 1 / 3], [-1 / 3, -2 / 3, 1 / 3]]}[c]
    return np.array(m) @ conv


def random_rotation(rng, reflect=False):
    q, r = np.linalg.qr(rng.normal(size=(3, 3)))
    q = q * np.sign(np.diag(r))
    if np.linalg.det(q) < 0:
        q[:, 0] = -q[:, 0]
    if reflect:
        q = q @ np.diag([1, 1, -1])
    return q


def random_unimodular(rng, target=1000):
    """Integer matrix with det +-1 whose largest entry is >= ``target`` (and < ~10 target).

    A product of elementary matrices with multipliers in -3..3, optionally with a
    row swap (det -1).
    """
    m = np.eye(3, dtype=np.int64)
    while np.abs(m).max() < target:
        i, j = rng.choice(3, 2, replace=False)
        e = np.eye(3, dtype=np.int64)
        e[i, j] = rng.choice([-3, -2, -1, 1, 2, 3])
        m = e @ m
    if rng.random() < 0.5:
        m = m[[1, 0, 2]]
    return m
