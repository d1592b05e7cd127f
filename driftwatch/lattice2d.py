"""Continuous invariants of 2D lattices (pure numpy, vectorised over frames).

Conventions (team reference ``shared/math.md`` sections 0-1 and 5):

* A basis is a (2, 2) array whose **rows** are the lattice vectors, in Angstrom.
  Every function accepts a stack ``(n, 2, 2)`` (one basis per frame) or a single
  ``(2, 2)`` basis; a single basis gives outputs without the frame axis.
* Obtuse superbase: v0 + v1 + v2 = 0, v_i . v_j <= 0, labelled so that the conorms
  p_ij = -v_i . v_j (Å^2) satisfy p12 <= p01 <= p02.  Root invariant
  RI = (r12, r01, r02) = sqrt of the conorms (Å), ascending.
* Projected invariant PI = (x, y) = ((r02 - r01)/s, 3 r12/s), s = r12 + r01 + r02
  (unitless).
* Types (International Tables 2D Bravais symbols): ``op`` rectangular (face
  r12 = 0), ``oc`` centred rectangular (faces r12 = r01 or r01 = r02), ``tp`` square
  (ray t(0, 1, 1)), ``hp`` hexagonal (ray t(1, 1, 1)), ``mp`` oblique (everything);
  ``mirror`` is the union of all achiral lattices (op or oc).

Reduction: a vectorised Lagrange/Gauss reduction (each pass subtracts the rounded
multiple of the shorter vector, so a skew of 10^k needs ~k passes, not 10^k
Selling steps), then Selling steps as a safety net (normally zero).  Loops run
only while some frame still changes.  Each frame is first scaled by an exact
power of two (tiny and huge cells behave alike), and b - mu a is formed with an
exact product (Dekker), so a skewed basis such as rows (1, 0), (1000.001, 0.002)
reduces with one rounding of the small result: its conorms match exact rational
arithmetic on the float input to ~1e-16 relative.  One reduction runs at
~0.6-1.5e6 frames/s on one core (measured); ``invariants`` returns everything
from one reduction.

Deformation measure (``deformation``): the root-space distances grow like the
square root of a strain near r12 = 0 (a right angle off by 0.014 degrees is
0.044 Å from ``op`` in root space), so they cannot be compared with spglib's
``symprec``.  ``deformation`` measures, in Å, the discrepancy between the
lattice and its images under the type's symmetry operations, in the quantities
spglib's lattice test compares:

* coordinates: the lengths l_k of the superbase vectors v_k (the shortest
  vectors of the three cosets of L/2L; l_k^2 = the sum of the two conorms
  containing k) and, for the pair k = {i, j} (the two vectors other than v_k),
  a_k = sqrt(l_i l_j) g(p_ij / (l_i l_j)), g = arcsin on [0, 1/2] continued
  linearly (slope 2/sqrt3): (90 deg - angle) x sqrt(l_i l_j) for a reduced pair;
* operations: the transposition of v_i and v_j (discrepancies |l_i - l_j| and
  |a_i - a_j|, combined as the larger for "linf", root-sum-square for "l2") and
  the mirror across a right angle between v_i and v_j (discrepancy 2 a_k);
* types: op = min over pairs of the flip; oc = min over transpositions; tp = min
  over k of the larger of pair k's flip and transposition k; hp = the worst of
  the three transpositions; mirror = min(op, oc);
* weights: spglib compares a reduced basis (the two shortest vectors in the
  plane), so w_k = min(1, l_2nd / l_k)^16, never below 1/2; a pair weighs
  w_i w_j; a swap uses the larger weight of its two sides;
* deformation = KAPPA x the above, KAPPA = 0.92 (as in ``lattice3d``).

It is 0 on the type and its closure, invariant, continuous (also across
r12 = 0, where the two obtuse superbases have the same lengths and angles) and
Lipschitz in the basis: a change delta of the basis entries moves it by at most
(8 (sqrt(rho) + 1) + 100 D / l_min) delta (rho: longest / shortest superbase
vector; the bound tested).  Calibration against spglib (one-atom slab cell, 40 Å
perpendicular axis; ``bench/calibrate_deformation.py``, docs/flags.md): a
sheared right angle gives R = deformation / critical symprec = KAPPA = 0.92 at
any aspect ratio (the old measure gave 0.34 for a 1:4 rectangle), a stretched
square 0.92 (1.13 with "l2"); random cells of every type with aspect up to 4
stay within 0.5 .. 2 (docs/flags.md has the measured ranges).  spglib ignores
angle changes below 1e-6 rad, so for smaller deformations R can be larger.  This
is an agreement measured on random cells, not a guarantee.
"""

from __future__ import annotations

import numpy as np

from .errors import LatticeError

__all__ = [
    "KAPPA", "TYPES", "SPECIALISES", "SIGN_TOL", "obtuse_superbase", "conorms",
    "root_invariant", "sign", "projected", "distances", "chiral_distance",
    "deformation", "lattice_distance", "invariants", "most_specific",
]

TYPES = ("op", "oc", "tp", "hp")
"""The 2D Bravais types with a mirror (International Tables symbols); ``mp`` is oblique."""

SPECIALISES = {
    "tp": ("op", "oc"),
    "hp": ("oc",),
    "op": ("mp",),
    "oc": ("mp",),
    "mp": (),
}
"""Direct containment: every lattice of the key type is also of each listed type."""

SIGN_TOL = 1e-7
"""Relative tie tolerance of ``sign`` (fraction of r02 on root differences)."""

_KEYS = ("op", "oc", "tp", "hp", "mirror")
_MAXIT = 10000
_BLOCK = 8192  # frames per block in the reduction (cache-sized)
_COLLINEAR = 1e-12  # |det| <= this * |a| |b|: collinear
_SELLING_TOL = 1e-13  # v_i.v_j > this * max|v|^2 triggers a Selling step
_NOISE = 8 * np.finfo(float).eps  # conorm rounding bound, see _superbase
_EPS = np.finfo(float).eps
LENGTH_RANGE = (1e-50, 1e50)
"""Å. Basis vectors outside this range are refused (their conorms and the squared distances
built from them would underflow or overflow in double precision); every real cell is far inside."""
_S2 = np.sqrt(2.0)
_W_SQUARINGS = 4  # frame weight (lambda / l)^16 = four squarings of lambda / l ...
_W_FLOOR = 0.5    # ... never below 1/2
KAPPA = 0.92
"""Calibration factor of ``deformation`` (unitless), the same as ``lattice3d.KAPPA``:
deformation = KAPPA x the largest discrepancy; centres deformation / spglib's critical
symprec on 1 over random cells of every type (``bench/calibrate_deformation.py``)."""


# ----------------------------------------------------------------------------- input

def _frames(bases):
    """Return (float array (n, 2, 2), single flag); reject bad shapes."""
    try:
        arr = np.asarray(bases, dtype=float)
    except (TypeError, ValueError) as exc:
        raise LatticeError(f"2D bases must be numeric arrays of shape (n, 2, 2) or (2, 2): {exc}") from None
    if arr.shape == (2, 2):
        return arr[None], True
    if arr.ndim == 3 and arr.shape[1:] == (2, 2):
        return arr, False
    raise LatticeError(f"2D bases must have shape (n, 2, 2) or (2, 2), got {arr.shape}")


def _where(i, single):
    return "basis" if single else f"frame {i}"


def _scaled(arr, single):
    """Validate bases; return them divided by an exact power of two per frame, and that factor.

    Raises LatticeError naming the first bad frame (non-finite, zero, collinear).
    """
    finite = np.isfinite(arr).all(axis=(1, 2))
    if not finite.all():
        i = int(np.flatnonzero(~finite)[0])
        raise LatticeError(f"{_where(i, single)}: basis contains non-finite numbers "
                           f"(NaN or inf): {arr[i].tolist()}")
    m = np.abs(arr).max(axis=(1, 2))
    if not m.all():
        i = int(np.flatnonzero(m == 0)[0])
        raise LatticeError(f"{_where(i, single)}: both basis vectors are zero")
    with np.errstate(over="ignore"):   # the squares cannot overflow; a length beyond the double
        lengths = np.sqrt(((arr / m[:, None, None]) ** 2).sum(axis=2)) * m[:, None]  # range: inf
    out = ((lengths > 0) & (lengths < LENGTH_RANGE[0])) | (lengths > LENGTH_RANGE[1])
    if out.any():
        i, k = (int(v) for v in np.argwhere(out)[0])
        raise LatticeError(f"{_where(i, single)}: basis vector {k} has length "
                           f"{lengths[i, k]:.3g} Å, outside {LENGTH_RANGE[0]:g}..{LENGTH_RANGE[1]:g} "
                           f"Å (squares of such lengths lose precision or overflow in double "
                           f"precision)")
    # exact power-of-two scaling (no rounding): tiny and huge cells behave alike
    scale = np.exp2(np.round(np.log2(m)))
    raw, arr = arr, arr / scale[:, None, None]
    n2 = np.einsum("nij,nij->ni", arr, arr)
    zero = n2 == 0
    if zero.any():
        i, k = (int(v) for v in np.argwhere(zero)[0])
        raise LatticeError(f"{_where(i, single)}: basis vector {k} is zero: {raw[i].tolist()}")
    det = arr[:, 0, 0] * arr[:, 1, 1] - arr[:, 0, 1] * arr[:, 1, 0]
    bad = np.abs(det) <= _COLLINEAR * np.sqrt(n2[:, 0] * n2[:, 1])
    if bad.any():
        i = int(np.flatnonzero(bad)[0])
        raise LatticeError(f"{_where(i, single)}: basis vectors are collinear "
                           f"(|det| = {abs(det[i]) * scale[i] ** 2:.3g} Å^2): {raw[i].tolist()}")
    return arr, scale


# ----------------------------------------------------------------------------- reduction

def _sub_multiple(b, mu, a):
    """b - mu * a with the product taken exactly (Dekker's two-product), so a
    reduction step adds one rounding of the (small) result, not of mu * a."""
    prod = mu * a
    c = 134217729.0 * a  # 2^27 + 1 split
    ah = c - (c - a)
    al = a - ah
    c = 134217729.0 * mu
    mh = c - (c - mu)
    ml = mu - mh
    err = ((mh * ah - prod) + mh * al + ml * ah) + ml * al
    return (b - prod) - err


def _selling(vx, vy, single, first=0):
    """Selling steps on superbases (components (n, 3)) until obtuse, Å.

    While v_i.v_j > 1e-13 max|v|^2: (v_i, v_j, v_k) -> (-v_i, v_j, v_i - v_j), which lowers
    sum |v|^2 by 4 v_i.v_j.  After the Gauss reduction this is a safety net (zero steps).
    """
    vx, vy = vx.copy(), vy.copy()
    pairs = ((0, 1), (0, 2), (1, 2))
    act = np.arange(vx.shape[0])
    for _ in range(_MAXIT):
        X, Y = vx[act], vy[act]
        dots = np.stack([X[:, i] * X[:, j] + Y[:, i] * Y[:, j] for i, j in pairs], axis=1)
        need = dots.max(axis=1) > _SELLING_TOL * (X * X + Y * Y).max(axis=1)
        if not need.any():
            return vx, vy
        act, X, Y, which = act[need], X[need], Y[need], dots[need].argmax(axis=1)
        for w, (i, j) in enumerate(pairs):
            sel = which == w
            k = 3 - i - j
            for Z in (X, Y):
                zi, zj = Z[sel, i], Z[sel, j]
                Z[sel, i], Z[sel, k] = -zi, zi - zj
        vx[act], vy[act] = X, Y
    raise LatticeError(f"{_where(first + int(act[0]), single)}: Selling reduction did not converge")


def _reduce(arr, single):
    """Obtuse superbase of validated bases, unlabelled: components vx, vy, each (n, 3).

    In cache-sized blocks of frames (1.5x faster at 10^6 frames than one pass; every frame is
    reduced on its own either way)."""
    n = arr.shape[0]
    if n <= _BLOCK:
        return _reduce_block(arr, single)
    parts = [_reduce_block(arr[s:s + _BLOCK], single, s) for s in range(0, n, _BLOCK)]
    return np.concatenate([v for v, _ in parts]), np.concatenate([v for _, v in parts])


def _reduce_block(arr, single, first=0):
    """``_reduce`` on one block; ``first`` is the index of its frame 0 (for error messages)."""
    n = arr.shape[0]
    ax, ay = arr[:, 0, 0].copy(), arr[:, 0, 1].copy()
    bx, by = arr[:, 1, 0].copy(), arr[:, 1, 1].copy()

    # Lagrange/Gauss reduction: |a| <= |b|, |a.b| <= |a|^2 / 2
    act = np.arange(n)
    for _ in range(_MAXIT):
        if act.size == 0:
            break
        Ax, Ay, Bx, By = ax[act], ay[act], bx[act], by[act]
        na, nb = Ax * Ax + Ay * Ay, Bx * Bx + By * By
        swap = nb < na
        Ax, Bx = np.where(swap, Bx, Ax), np.where(swap, Ax, Bx)
        Ay, By = np.where(swap, By, Ay), np.where(swap, Ay, By)
        na, nb = np.where(swap, nb, na), np.where(swap, na, nb)
        mu = np.rint((Ax * Bx + Ay * By) / na)
        Cx, Cy = _sub_multiple(Bx, mu, Ax), _sub_multiple(By, mu, Ay)
        # accept only strict progress: at a.b/|a|^2 = -0.5 +- 1 ulp rounding could cycle
        step = (mu != 0) & (Cx * Cx + Cy * Cy < nb)
        ax[act], ay[act] = Ax, Ay
        bx[act], by[act] = np.where(step, Cx, Bx), np.where(step, Cy, By)
        act = act[step | swap]
    else:  # pragma: no cover - needs ~1e4 halvings, impossible after validation
        raise LatticeError(f"{_where(first + int(act[0]), single)}: Lagrange reduction did not converge")

    flip = ax * bx + ay * by > 0
    bx, by = np.where(flip, -bx, bx), np.where(flip, -by, by)
    vx = np.stack([-(ax + bx), ax, bx], axis=1)
    vy = np.stack([-(ay + by), ay, by], axis=1)

    return _selling(vx, vy, single, first)


def _superbase(bases, labelled=True):
    """Labelled obtuse superbase (n, 3, 2), conorms (n, 3), single flag, conorm noise (n,).

    ``labelled=False`` returns (None, conorms, single, None): the fast path for invariants.
    """
    arr, single = _frames(bases)
    arr, scale = _scaled(arr, single)
    vx, vy = _reduce(arr, single)
    n = arr.shape[0]
    # q_k = conorm of the pair that does not contain k
    q = -np.stack([vx[:, 1] * vx[:, 2] + vy[:, 1] * vy[:, 2],
                   vx[:, 0] * vx[:, 2] + vy[:, 0] * vy[:, 2],
                   vx[:, 0] * vx[:, 1] + vy[:, 0] * vy[:, 1]], axis=1)
    # a conorm within its dot product's rounding (16 eps max|v|^2) is 0: a lattice of a type,
    # in any orientation or basis, is at distance 0 from it, not ~1e-8 |v|
    q = np.where(q > 16 * _EPS * (vx * vx + vy * vy).max(axis=1, keepdims=True), q, 0.0)
    if not labelled:
        return None, np.maximum(np.sort(q, axis=1), 0.0) * (scale * scale)[:, None], single, None
    # Rounding the input already carries (Å^2): v_i = sum_j C_ij row_j with integer C,
    # so each input row's rounding (eps |row_j|) reaches v_i as e_i = eps sum_j |C_ij| |row_j|
    # and a conorm -v_i.v_j as ~ e_i |v_j| + e_j |v_i|.  For a reduced input C is small
    # and this is ~1e-15 |v|^2; for a skewed input (large C) it can be much larger.
    (r0x, r0y), (r1x, r1y) = arr[:, 0].T, arr[:, 1].T
    det = (r0x * r1y - r0y * r1x)[:, None]
    c0 = np.abs(np.rint((vx * r1y[:, None] - vy * r1x[:, None]) / det))
    c1 = np.abs(np.rint((vy * r0x[:, None] - vx * r0y[:, None]) / det))
    e = c0 * np.hypot(r0x, r0y)[:, None] + c1 * np.hypot(r1x, r1y)[:, None]
    noise = _NOISE * 2 * e.max(axis=1) * np.sqrt((vx * vx + vy * vy).max(axis=1))
    order = np.argsort(q, axis=1, kind="stable")  # k_small, k_mid, k_large
    base = 3 * np.arange(n)[:, None]
    # v0 opposite the smallest conorm, v1 opposite the largest, v2 opposite the middle one
    perm = order[:, [0, 2, 1]] + base
    v = np.stack([vx.ravel()[perm], vy.ravel()[perm]], axis=2) * scale[:, None, None]
    p = np.maximum(q.ravel()[order + base], 0.0) * (scale * scale)[:, None]
    return v, p, single, noise * scale * scale


def _out(x, single):
    return x[0] if single else x


def obtuse_superbase(bases):
    """Obtuse superbase of each lattice, (n, 3, 2) Å: rows v0, v1, v2.

    v0 + v1 + v2 = 0, v_i . v_j <= 0 (up to ~1e-13 |v|^2 of rounding) and the
    labels make p12 <= p01 <= p02, so v1 is a shortest lattice vector.  Unique up
    to a common sign, except for rectangular lattices (p12 = 0), which have two
    mirror-image superbases; either may be returned.  Raises ``LatticeError``
    naming the frame for non-finite, zero or collinear vectors.
    """
    v, _, single, _ = _superbase(bases)
    return _out(v, single)


def conorms(bases):
    """Conorms [p12, p01, p02] of the obtuse superbase, (n, 3) Å^2, ascending, >= 0.

    Rounding residues (below 16 eps |v|^2, the rounding of their dot products) are 0.
    """
    _, p, single, _ = _superbase(bases, labelled=False)
    return _out(p, single)


def root_invariant(bases):
    """Root invariant [r12, r01, r02] = sqrt(conorms), (n, 3) Å, ascending.

    Determines the lattice up to isometry (rotation or mirror).  Square of side
    a -> (0, a, a); hexagonal with shortest vector a -> (a/√2, a/√2, a/√2).
    """
    _, p, single, _ = _superbase(bases, labelled=False)
    return _out(np.sqrt(p), single)


def _root_diffs(p, r):
    """Root differences (r01 - r12, r02 - r01, r02 - r12) as (p_b - p_a)/(r_a + r_b), Å."""
    def d(i, j):
        den = r[:, i] + r[:, j]
        return np.divide(p[:, j] - p[:, i], den, out=np.zeros_like(den), where=den > 0)
    return d(0, 1), d(1, 2), d(0, 2)


def _sign(v, p, noise):
    r = np.sqrt(p)
    tol = SIGN_TOL * r[:, 2]
    achiral = ((r[:, 0] <= np.maximum(tol, np.sqrt(noise)))
               | (p[:, 1] - p[:, 0] <= np.maximum(tol * (r[:, 0] + r[:, 1]), noise))
               | (p[:, 2] - p[:, 1] <= np.maximum(tol * (r[:, 1] + r[:, 2]), noise)))
    det = v[:, 1, 0] * v[:, 2, 1] - v[:, 1, 1] * v[:, 2, 0]
    s = np.sign(det).astype(np.int8)
    s[achiral] = 0
    return s


def sign(bases):
    """Orientation of each lattice, (n,) int8 in {-1, 0, +1} (unitless).

    sign(det(v1, v2)) of the labelled obtuse superbase (p12 <= p01 <= p02).  It is
    exactly 0 for every lattice with a mirror: a lattice counts as on a face when
    r12 <= 1e-7 r02, r01 - r12 <= 1e-7 r02 or r02 - r01 <= 1e-7 r02, with the root
    differences computed as (p_b - p_a)/(r_a + r_b) (``SIGN_TOL``).  A zero conorm
    computes as ~1e-16 |v|^2, i.e. r12 ~ 1e-8 |v|, which is why the tolerance is
    not tighter.  For skewed input the floor is raised to the rounding the input
    itself carries: with v_i = sum_j C_ij row_j (integer C), conorm differences
    below 16 eps max_i(sum_j |C_ij| |row_j|) max|v| (Å^2) also count as ties.  So
    rows (1, 0), (1000.001, 0.002), a rectangular lattice written in decimals,
    gets 0; for a reduced input this floor is below the 1e-7 r02 tolerance.
    Invariant under rotation and change of basis; flips under a mirror.  For
    layers the sign depends on the viewing side of the plane.
    """
    v, p, single, noise = _superbase(bases)
    return _out(_sign(v, p, noise), single)


def _projected(p):
    r = np.sqrt(p)
    d1, d2, d02 = _root_diffs(p, r)
    s = r.sum(axis=1)
    # (x, y, 1 - x - y, 1 - y), each from differences to keep precision near the edges
    return d2 / s, 3 * r[:, 0] / s, 2 * d1 / s, (d1 + d02) / s


def projected(bases):
    """Projected invariant [x, y] = [(r02 - r01)/s, 3 r12/s], s = r12 + r01 + r02, (n, 2) unitless.

    Fills the triangle x, y >= 0, x + y <= 1; square -> (0, 0), hexagonal -> (0, 1).
    """
    _, p, single, _ = _superbase(bases)
    x, y, _, _ = _projected(p)
    return _out(np.stack([x, y], axis=1), single)


# ----------------------------------------------------------------------------- distances

def _check_metric(metric):
    if metric not in ("l2", "linf"):
        raise ValueError(f"metric must be 'l2' or 'linf', got {metric!r}")


def _check_space(space):
    if space not in ("root", "projected"):
        raise ValueError(f"space must be 'root' or 'projected', got {space!r}")


def _cone(t0, d1, d2, d02, metric):
    """Distances to the type cones of an ascending triple (t0 <= t1 <= t2).

    t0 = smallest coordinate, d1 = t1 - t0, d2 = t2 - t1, d02 = t2 - t0.  Faces:
    t0 = 0 (op), t0 = t1 or t1 = t2 (oc), both t0 = 0 and t1 = t2 (tp), all equal (hp).
    """
    if metric == "l2":
        oc = np.minimum(d1, d2) / _S2
        tp = np.hypot(t0, d2 / _S2)
        hp = np.sqrt((d1 * d1 + d2 * d2 + d02 * d02) / 3.0)
    else:
        oc = np.minimum(d1, d2) / 2.0
        tp = np.maximum(t0, d2 / 2.0)
        hp = d02 / 2.0
    op = np.asarray(t0, dtype=float)
    return {"op": op, "oc": oc, "tp": tp, "hp": hp, "mirror": np.minimum(op, oc)}


def _distances(p, metric, space):
    if space == "root":
        r = np.sqrt(p)
        d1, d2, d02 = _root_diffs(p, r)
        return _cone(r[:, 0], d1, d2, d02, metric)
    x, y, xy1, y1 = _projected(p)
    if metric == "l2":
        e = xy1 / _S2
        tp, hp = np.hypot(x, y), np.hypot(x, y1)
    else:
        e = xy1 / 2.0
        tp, hp = np.maximum(x, y), np.maximum(x, y1)
    oc = np.minimum(x, e)
    return {"op": y, "oc": oc, "tp": tp, "hp": hp, "mirror": np.minimum(y, oc)}


def distances(bases, metric="l2", space="root"):
    """Distances to the symmetric 2D lattice types, dict ``op oc tp hp mirror`` of (n,) arrays.

    ``space="root"``: Euclidean (``metric="l2"``) or max-norm (``"linf"``) distance
    in root-invariant space, Å, from RI = (a, b, c) to the face/ray of the type
    (closed forms of math.md 1.4, e.g. op = a, oc = min(b - a, c - b)/√2).
    ``space="projected"``: the same in the projected triangle, unitless.
    ``mirror`` = min(op, oc), the chiral distance without sign.  These distances
    behave like sqrt(strain) near r12 = 0; see ``deformation`` for a measure to
    compare with spglib's ``symprec``.
    """
    _check_metric(metric)
    _check_space(space)
    _, p, single, _ = _superbase(bases)
    d = _distances(p, metric, space)
    return {k: _out(d[k], single) for k in _KEYS}


def chiral_distance(bases, metric="l2", space="root"):
    """Signed chiral distance, (n,): sign × mirror distance (Å in root space, unitless projected).

    Continuous in the lattice: the sign changes only where the distance is 0.
    """
    _check_metric(metric)
    _check_space(space)
    v, p, single, noise = _superbase(bases)
    d = _distances(p, metric, space)["mirror"] * _sign(v, p, noise)
    return _out(d, single)


def _power16(x):
    """x^16 by ``_W_SQUARINGS`` squarings (faster than ``np.power``)."""
    for _ in range(_W_SQUARINGS):
        x = x * x
    return x


def _deformation(v, p, metric):
    """Deformation (Å) of labelled superbases v (n, 3, 2) with conorms p = [p12, p01, p02]."""
    # vector k of the superbase; pair k = the two vectors other than v_k, conorm c_k.
    # |v_k| = sqrt of the sum of the two conorms containing k, taken from the vectors
    # themselves: at extreme aspect ratios (1e16) rounding can zero both conorms
    c = (p[:, 0], p[:, 2], p[:, 1])                        # p12, p02, p01
    l = list(np.sqrt(np.einsum("nki,nki->kn", v, v)))
    other = ((1, 2), (0, 2), (0, 1))
    lam = l[0] + l[1] + l[2] - np.maximum(np.maximum(l[0], l[1]), l[2]) \
        - np.minimum(np.minimum(l[0], l[1]), l[2])         # second shortest: the frame
    w = [np.maximum(_W_FLOOR, _power16(np.minimum(1.0, lam / lk))) for lk in l]
    wp, angle = [], []
    for k, (i, j) in enumerate(other):
        ll = l[i] * l[j]
        t = c[k] / ll                                     # |cos| of the angle of pair k
        angle.append((np.arcsin(np.minimum(t, 0.5)) + np.maximum(t - 0.5, 0.0) * (2 / np.sqrt(3)))
                     * np.sqrt(ll))
        wp.append(w[i] * w[j])
    flip, swap = [], []
    for k, (i, j) in enumerate(other):
        flip.append(2.0 * wp[k] * angle[k])               # mirror across pair k's right angle
        dl = np.maximum(w[i], w[j]) * np.abs(l[i] - l[j])   # transposition of v_i and v_j
        da = np.maximum(wp[i], wp[j]) * np.abs(angle[i] - angle[j])
        swap.append(np.maximum(dl, da) if metric == "linf" else np.sqrt(dl * dl + da * da))
    op = np.minimum(np.minimum(flip[0], flip[1]), flip[2])
    oc = np.minimum(np.minimum(swap[0], swap[1]), swap[2])
    tp = np.minimum(np.minimum(np.maximum(flip[0], swap[0]), np.maximum(flip[1], swap[1])),
                    np.maximum(flip[2], swap[2]))
    hp = np.maximum(np.maximum(swap[0], swap[1]), swap[2])
    return {"op": KAPPA * op, "oc": KAPPA * oc, "tp": KAPPA * tp, "hp": KAPPA * hp,
            "mirror": KAPPA * np.minimum(op, oc)}


def deformation(bases, metric="l2"):
    """Lipschitz deformation measure, dict ``op oc tp hp mirror`` of (n,) arrays, Å.

    KAPPA x the discrepancy between the lattice and its images under the type's
    symmetry operations, in the lengths l_k of the three superbase vectors (the
    shortest vectors of the three cosets of L/2L) and the angle coordinates
    a_k = sqrt(l_i l_j) arcsin(p_ij / (l_i l_j)) of their pairs (p_ij the conorm;
    arcsin continued linearly above 1/2), both in Å (details in the module
    docstring).  The transposition of v_i and v_j has discrepancies |l_i - l_j|
    and |a_ik - a_jk| (larger for "linf", root-sum-square for "l2"); a right angle
    between v_i and v_j that a mirror flips gives 2 a_ij.  op: min over pairs of the
    flip; oc: min over transpositions; tp: the same pair's flip and transposition
    (larger); hp: the worst of the three transpositions; mirror = min(op, oc).
    Comparisons are weighted by 1 for the two shortest vectors, falling to 1/2 for
    longer ones.  0 on the type and its closure, Lipschitz in the basis, invariant;
    comparable with spglib's ``symprec`` (ratio within about 0.5 .. 2, docs/flags.md).
    """
    _check_metric(metric)
    v, p, single, _ = _superbase(bases)
    d = _deformation(v, p, metric)
    return {k: _out(d[k], single) for k in _KEYS}


def _norm(x, metric):
    return np.sqrt((x * x).sum(axis=-1)) if metric == "l2" else np.abs(x).max(axis=-1)


def lattice_distance(a, b, oriented=True, metric="l2", space="root"):
    """Distance between lattices ``a`` and ``b``, broadcast over frames, (n,) or scalar.

    Plain: |RI(a) - RI(b)| (Å) or |PI(a) - PI(b)| (unitless) in ``metric``.
    ``oriented=True`` and opposite signs: a path between them must cross a mirror
    lattice, so the distance is the nearest reflected image of b (reflections in
    the three cone faces), which equals min over mirror lattices C of
    d(a, C) + d(C, b).  d(L, mirror L) = 2 × chiral distance.
    """
    _check_metric(metric)
    _check_space(space)
    va, pa, sa_single, na = _superbase(a)
    vb, pb, sb_single, nb = _superbase(b)
    if space == "root":
        A, B = np.sqrt(pa), np.sqrt(pb)
        images = lambda t: (np.stack([-t[..., 0], t[..., 1], t[..., 2]], -1),
                            np.stack([t[..., 1], t[..., 0], t[..., 2]], -1),
                            np.stack([t[..., 0], t[..., 2], t[..., 1]], -1))
    else:
        xa, ya, _, _ = _projected(pa)
        xb, yb, _, _ = _projected(pb)
        A, B = np.stack([xa, ya], 1), np.stack([xb, yb], 1)
        images = lambda t: (np.stack([-t[..., 0], t[..., 1]], -1),
                            np.stack([t[..., 0], -t[..., 1]], -1),
                            np.stack([1 - t[..., 1], 1 - t[..., 0]], -1))
    if A.shape[0] != B.shape[0] and 1 not in (A.shape[0], B.shape[0]):
        raise ValueError(f"cannot broadcast {A.shape[0]} frames against {B.shape[0]}")
    d = _norm(A - B, metric)
    if oriented:
        opposite = (_sign(va, pa, na).astype(int) * _sign(vb, pb, nb)) < 0
        if np.any(opposite):
            dim = np.min([_norm(A - im, metric) for im in images(B)], axis=0)
            d = np.where(opposite, dim, d)
    d = np.broadcast_to(d, (max(A.shape[0], B.shape[0]),))
    return d[0] if (sa_single and sb_single) else np.array(d)


def invariants(bases, metric="l2"):
    """All per-frame 2D invariants from ONE reduction (the fast path for trajectories).

    Returns a dict: ``superbase`` (n, 3, 2) Å, ``conorms`` (n, 3) Å^2,
    ``root_invariant`` (n, 3) Å, ``sign`` (n,) int8, ``projected`` (n, 2),
    ``chiral_distance`` (n,) Å, ``distances`` (dict, Å, root space),
    ``distances_projected`` (dict, unitless) and ``deformation`` (dict, Å), all in
    ``metric``.  Values equal those of the single-purpose functions.
    """
    _check_metric(metric)
    v, p, single, noise = _superbase(bases)
    s = _sign(v, p, noise)
    x, y, _, _ = _projected(p)
    d = _distances(p, metric, "root")
    dp = _distances(p, metric, "projected")
    out = {
        "superbase": v, "conorms": p, "root_invariant": np.sqrt(p), "sign": s,
        "projected": np.stack([x, y], axis=1), "chiral_distance": d["mirror"] * s,
        "distances": d, "distances_projected": dp,
        "deformation": _deformation(v, p, metric),
    }
    return {k: ({kk: _out(vv, single) for kk, vv in val.items()} if isinstance(val, dict)
                else _out(val, single)) for k, val in out.items()}


def most_specific(dist, tol):
    """Most specific type whose distance is <= ``tol`` (same units as ``dist``), else ``"mp"``.

    ``dist`` is a dict with keys ``op oc tp hp`` (scalars or (n,) arrays), as from
    ``distances`` or ``deformation``.  ``tp``/``hp`` are preferred over ``op``/``oc``;
    within a level the smaller distance wins.  Returns a str for scalar input,
    else an (n,) array of str.
    """
    d = {k: np.asarray(dist[k], dtype=float) for k in TYPES}
    tol = np.asarray(tol, dtype=float)
    shape = np.broadcast_shapes(tol.shape, *(x.shape for x in d.values()))
    out = np.full(shape, "mp", dtype="<U2")
    for level in (("op", "oc"), ("tp", "hp")):  # later (more specific) levels override
        best = np.full(shape, np.inf)
        name = np.full(shape, "", dtype="<U2")
        for k in level:
            x = np.broadcast_to(d[k], shape)
            take = (x <= tol) & (x < best)
            best = np.where(take, x, best)
            name = np.where(take, k, name)
        out = np.where(name != "", name, out)
    return str(out) if out.ndim == 0 else out
