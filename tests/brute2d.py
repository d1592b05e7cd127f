"""Independent brute-force reference for 2D lattice invariants (tests only).

Nothing here imports driftwatch.  Methods (common practice, and shared/math.md 0-1):

* exact arithmetic: a float basis is an exact rational; Gram matrices, a scalar
  Lagrange reduction and the enumeration below use ``fractions.Fraction``;
* superbases: enumerate all integer combinations u, w of the reduced basis with
  coefficients in [-K, K], keep pairs with det = ±1 and u.w, u.v0, w.v0 <= 0
  (v0 = -u - w) exactly: these are ALL obtuse superbases (each v_i is a shortest
  vector of its coset of L/2L, so small coefficients suffice after reduction);
* the type of a lattice by counting its point group (integer matrices M with
  M G M^T = G), International Tables orders: mp 2, op/oc 4, tp 8, hp 12;
* distance to a type by numerical minimisation (scipy Nelder-Mead) over lattices
  of that type, parametrised by their conventional parameters.
"""

from fractions import Fraction
from itertools import product

import numpy as np
from scipy.optimize import minimize


# ----------------------------------------------------------------------------- exact

def _dot(u, v):
    return u[0] * v[0] + u[1] * v[1]


def _reduce_exact(basis):
    a = [Fraction(float(x)) for x in basis[0]]
    b = [Fraction(float(x)) for x in basis[1]]
    while True:
        if _dot(b, b) < _dot(a, a):
            a, b = b, a
        mu = round(_dot(a, b) / _dot(a, a))
        if mu == 0:
            return a, b
        b = [b[0] - mu * a[0], b[1] - mu * a[1]]


def obtuse_superbases(basis, K=2):
    """All obtuse superbases (v0, v1, v2) of the lattice, exact Fractions, any labelling."""
    a, b = _reduce_exact(basis)
    coeffs = [(i, j) for i, j in product(range(-K, K + 1), repeat=2) if (i, j) != (0, 0)]
    vec = {c: [c[0] * a[0] + c[1] * b[0], c[0] * a[1] + c[1] * b[1]] for c in coeffs}
    out = []
    for c1 in coeffs:
        for c2 in coeffs:
            if abs(c1[0] * c2[1] - c1[1] * c2[0]) != 1:
                continue
            u, w = vec[c1], vec[c2]
            v0 = [-u[0] - w[0], -u[1] - w[1]]
            if _dot(u, w) <= 0 and _dot(u, v0) <= 0 and _dot(w, v0) <= 0:
                out.append((v0, u, w))
    return out


def exact_conorms(basis):
    """Sorted conorms (p12 <= p01 <= p02) as Fractions; asserts all superbases agree."""
    sets = {tuple(sorted([-_dot(s[1], s[2]), -_dot(s[0], s[2]), -_dot(s[0], s[1])]))
            for s in obtuse_superbases(basis)}
    assert len(sets) == 1, f"obtuse superbases disagree: {sets}"
    return sets.pop()


def root_invariant(basis):
    """(r12, r01, r02), Å, from the exact conorms."""
    return np.sqrt(np.array([float(p) for p in exact_conorms(basis)]))


def sign(basis):
    """Sign from the enumeration: 0 if any conorm is 0 or two tie (exactly), else det sign."""
    sb = obtuse_superbases(basis)
    s = sb[0]
    q = [-_dot(s[1], s[2]), -_dot(s[0], s[2]), -_dot(s[0], s[1])]  # opposite v0, v1, v2
    if min(q) == 0 or len(set(q)) < 3:
        return 0
    k0, k2, k1 = sorted(range(3), key=lambda k: q[k])  # v0 opp. smallest, v1 opp. largest
    v1, v2 = s[k1], s[k2]
    det = v1[0] * v2[1] - v1[1] * v2[0]
    return 1 if det > 0 else -1


def shortest_length(basis, K=3):
    a, b = _reduce_exact(basis)
    best = min(_dot(v, v) for v in ([i * a[0] + j * b[0], i * a[1] + j * b[1]]
                                     for i, j in product(range(-K, K + 1), repeat=2)
                                     if (i, j) != (0, 0)))
    return float(best) ** 0.5


def point_group_order(basis, rtol=1e-9, K=2):
    """Number of integer matrices M (entries in [-K, K]) with M G M^T = G (float, rtol)."""
    a, b = _reduce_exact(basis)
    B = np.array([[float(x) for x in a], [float(x) for x in b]])
    G = B @ B.T
    n = 0
    for m in product(range(-K, K + 1), repeat=4):
        M = np.array(m, dtype=float).reshape(2, 2)
        if abs(round(np.linalg.det(M))) != 1:
            continue
        if np.abs(M @ G @ M.T - G).max() <= rtol * np.abs(G).max():
            n += 1
    return n


TYPE_OF_ORDER = {2: "mp", 8: "tp", 12: "hp"}  # order 4: op or oc (see lattice_type)


def lattice_type(basis):
    """2D Bravais type from the point-group order and, for order 4, a zero conorm."""
    n = point_group_order(basis)
    if n == 4:
        p = exact_conorms(basis)
        return "op" if abs(float(p[0])) <= 1e-12 * float(p[2]) else "oc"
    return TYPE_OF_ORDER[n]


# ----------------------------------------------------------------------------- float brute RI

_C = np.array([(i, j) for i, j in product(range(-2, 3), repeat=2) if (i, j) != (0, 0)], float)
_PAIRS = [(x, y) for x in range(len(_C)) for y in range(len(_C))
          if abs(_C[x, 0] * _C[y, 1] - _C[x, 1] * _C[y, 0]) == 1]
_I = np.array([p[0] for p in _PAIRS])
_J = np.array([p[1] for p in _PAIRS])


def _reduce_float(B):
    a, b = B[0].copy(), B[1].copy()
    for _ in range(200):
        if b @ b < a @ a:
            a, b = b, a
        mu = np.rint(a @ b / (a @ a))
        if mu == 0:
            break
        b = b - mu * a
    return np.array([a, b])


def ri_float(B):
    """Root invariant by float enumeration of superbases (for the optimiser)."""
    V = _C @ _reduce_float(np.asarray(B, float))
    u, w = V[_I], V[_J]
    v0 = -u - w
    q = -np.stack([(u * w).sum(1), (u * v0).sum(1), (w * v0).sum(1)], 1)
    tol = 1e-12 * (u * u).sum(1).max()
    ok = (q >= -tol).all(1)
    p = np.sort(q[ok][0])
    return np.sqrt(np.maximum(p, 0))


def pi_float(B):
    r = ri_float(B)
    s = r.sum()
    return np.array([(r[2] - r[1]) / s, 3 * r[0] / s])


# ----------------------------------------------------------------------------- optimiser

def _lattice(kind, t):
    """A lattice of type ``kind`` from unconstrained parameters t."""
    if kind == "op":
        return np.array([[np.exp(t[0]), 0], [0, np.exp(t[1])]])
    if kind == "oc":
        a, g = np.exp(t[0]), np.pi / (1 + np.exp(-t[1]))
        return np.array([[a, 0], [a * np.cos(g), a * np.sin(g)]])
    if kind == "tp":
        return np.exp(t[0]) * np.eye(2)
    if kind == "hp":
        return np.exp(t[0]) * np.array([[1, 0], [0.5, np.sqrt(3) / 2]])
    raise ValueError(kind)


def _starts(kind, basis, rng, n):
    """Starting points: conventional parameters suggested by the target's short vectors, plus random."""
    ri = ri_float(basis)
    L = np.sqrt(ri[1] ** 2 + ri[0] ** 2)
    M = np.sqrt(ri[2] ** 2 + ri[0] ** 2)
    out = []
    if kind == "oc":  # rhombi spanned by each pair of the target's superbase vectors
        a, b = _reduce_float(np.asarray(basis, float))
        for u, w in ((a, b), (a, -b), (a, a + b), (b, a + b)):
            g = np.arccos(np.clip(u @ w / np.sqrt((u @ u) * (w @ w)), -1, 1))
            g = np.clip(g, 1e-3, np.pi - 1e-3)
            out.append([np.log((np.sqrt(u @ u) + np.sqrt(w @ w)) / 2), np.log(g / (np.pi - g))])
    for _ in range(n):
        f = np.exp(rng.normal(0, 0.3))
        if kind == "op":
            out.append([np.log(L * f), np.log(M / f)])
        elif kind == "oc":
            out.append([np.log((L + M) / 2 * f), rng.normal(0, 1.5)])
        else:
            out.append([np.log((L + M) / 2 * f)])
    return out


def min_distance(basis, kind, metric="l2", space="root", seed=0, starts=4):
    """Numerically minimised distance from ``basis`` to lattices of type ``kind``.

    kind in op oc tp hp mirror (mirror = min of op and oc).  An upper bound; with the
    restarts it reaches the infimum to ~1e-9 on ordinary lattices.
    """
    if kind == "mirror":
        return min(min_distance(basis, k, metric, space, seed, starts) for k in ("op", "oc"))
    f = ri_float if space == "root" else pi_float
    target = f(basis)
    ord_ = 2 if metric == "l2" else np.inf
    obj = lambda t: np.linalg.norm(f(_lattice(kind, t)) - target, ord=ord_)
    rng = np.random.default_rng(seed)
    best = np.inf
    for x0 in _starts(kind, basis, rng, starts):
        x = np.asarray(x0, float)
        for _ in range(3):  # restarts help Nelder-Mead on the non-smooth L-inf objective
            res = minimize(obj, x, method="Nelder-Mead",
                           options={"xatol": 1e-11, "fatol": 1e-13, "maxiter": 4000})
            x = res.x
        best = min(best, res.fun)
    return float(best)


def isometric(a, b, proper=False, rtol=1e-8, K=3):
    """True if lattices a and b are isometric (rotation, or also mirror unless ``proper``).

    Brute force: some integer M (entries in [-K, K], det +-1) maps the reduced Gram
    matrix of b onto that of a; for ``proper`` the induced orthogonal map has det +1.
    """
    A = _reduce_float(np.asarray(a, float))
    Bm = _reduce_float(np.asarray(b, float))
    Ga, Gb = A @ A.T, Bm @ Bm.T
    for m in product(range(-K, K + 1), repeat=4):
        M = np.array(m, dtype=float).reshape(2, 2)
        dm = round(np.linalg.det(M))
        if abs(dm) != 1:
            continue
        if np.abs(M @ Gb @ M.T - Ga).max() <= rtol * np.abs(Ga).max():
            if not proper or np.linalg.det(A) / (dm * np.linalg.det(Bm)) > 0:
                return True
    return False
