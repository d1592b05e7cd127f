"""Layer geometry: layer or bulk, vacuum axis, in-plane lattice and viewing side, layers in bulk.

External references named beside each check: ASE (ase.build, ase.geometry dimensionality
analysis and isolate_components), real pw.x outputs in tests/data/qe, the VASP fixtures of
tests/vasp_gen.py, and plain vector geometry marked "common practice".
"""
from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from ase import Atoms
from ase.build import bulk, mx2
from ase.geometry.dimensionality import isolate_components

from driftwatch import geometry
from driftwatch.errors import GeometryError
from driftwatch.geometry import (DEFAULT_GAP, classify, find_layers, inplane_bases,
                                 layers_in_bulk, plane_normals, vacuum_gaps)

import vasp_gen

QE = Path(__file__).parent / "data" / "qe"


def _rotation(seed):
    q, r = np.linalg.qr(np.random.default_rng(seed).standard_normal((3, 3)))
    q = q * np.sign(np.diag(r))
    return q if np.linalg.det(q) > 0 else -q


def _layer_on_axis(axis, vacuum=15.0):
    """An invented oblique 2-atom layer whose vacuum lies along cell vector ``axis``.

    The in-plane vectors a, b go to the two other slots in cyclic order, so the cell keeps
    its handedness whichever axis holds the vacuum.
    """
    a = np.array([3.3, 0.0, 0.0])
    b = np.array([-0.9, 3.6, 0.0])
    c = np.array([0.4, -0.2, vacuum])
    frac = np.array([[0.0, 0.0, 0.50], [0.37, 0.61, 0.56]])    # columns: along a, b, c
    i, j = {2: (0, 1), 0: (1, 2), 1: (2, 0)}[axis]
    cell = np.empty((3, 3))
    cell[i], cell[j], cell[axis] = a, b, c
    fr = np.empty_like(frac)
    fr[:, i], fr[:, j], fr[:, axis] = frac[:, 0], frac[:, 1], frac[:, 2]
    return cell, fr @ cell


# ---------------------------------------------------------------- classify
@pytest.mark.parametrize("axis", [0, 1, 2])
def test_layer_by_pbc_on_each_axis(axis):
    cell, pos = _layer_on_axis(axis, vacuum=4.0)       # thin vacuum: pbc alone decides
    pbc = [True] * 3
    pbc[axis] = False
    g = classify(cell, pbc, pos)
    assert (g.dimension, g.vacuum_axis) == (2, axis)
    assert np.dot(g.viewing_side, cell[axis]) > 0      # viewing side = side of c_vac
    assert np.isclose(np.linalg.norm(g.viewing_side), 1.0)


@pytest.mark.parametrize("axis", [0, 1, 2])
def test_layer_by_vacuum_gap_on_each_axis(axis):
    cell, pos = _layer_on_axis(axis, vacuum=15.0)
    g = classify(cell, [True] * 3, pos)
    assert (g.dimension, g.vacuum_axis) == (2, axis)
    # gap along the normal: slab thickness 0.06 * 15 Å along the normal (common practice:
    # plane spacing = volume / in-plane area), so the gap is 0.94 * that spacing
    spacing = abs(np.linalg.det(cell)) / np.linalg.norm(np.cross(*np.delete(cell, axis, 0)))
    assert g.gaps[axis] == pytest.approx(0.94 * spacing)
    assert f"axis {axis}" in g.reason


def test_bulk_and_threshold():
    si = bulk("Si", "diamond", a=5.43)                 # ASE's diamond Si: bulk, no vacuum
    g = classify(si.cell.array, si.pbc, si.positions)
    assert g.dimension == 3 and g.vacuum_axis is None and g.viewing_side is None
    cell, pos = _layer_on_axis(2, vacuum=8.0)          # 7.5 Å gap along the normal
    assert classify(cell, True, pos).dimension == 2
    assert classify(cell, True, pos, gap=10.0).dimension == 3
    assert DEFAULT_GAP == 6.0


def test_ase_2d_cell_with_zero_vacuum_vector():
    """ASE's mx2 builder without vacuum gives c = 0 and pbc (T, T, F) (ASE convention)."""
    layer = mx2("MoS2", a=3.18, vacuum=None)
    assert layer.pbc.tolist() == [True, True, False] and not layer.cell.array[2].any()
    g = classify(layer.cell.array, layer.pbc, layer.positions)
    assert (g.dimension, g.vacuum_axis) == (2, 2)
    np.testing.assert_allclose(g.viewing_side, [0, 0, 1], atol=1e-12)
    assert np.linalg.det(inplane_bases(layer.cell.array, 2)) > 0


def test_1d_and_0d_cells_are_clear_errors():
    cell, pos = _layer_on_axis(2)
    with pytest.raises(GeometryError, match="a wire or chain: periodic along 1 axes"):
        classify(cell, [True, False, False], pos)
    with pytest.raises(GeometryError, match="a molecule or cluster: periodic along 0 axes"):
        classify(cell, [False] * 3, pos)
    wire = Atoms("C2", positions=[[0, 0, 0], [0, 0, 1.3]], cell=[12, 12, 2.6], pbc=True)
    with pytest.raises(GeometryError, match=r"chains or molecules in a box: .* axes \[0, 1\]"):
        classify(wire.cell.array, wire.pbc, wire.positions)
    with pytest.raises(GeometryError, match="a molecule or cluster in a box"):
        classify(np.diag([15.0, 15, 15]), True, [[7, 7, 7], [7, 7, 8.1]])
    # the kind is the structure's, whichever basis the file writes (a field trial saw a molecule
    # called a wire in some bases): the same two cells in a sheared basis
    M = np.array([[1, 1, 0], [0, 1, 0], [1, 0, 1]])
    with pytest.raises(GeometryError, match="chains or molecules in a box"):
        classify(M @ wire.cell.array, wire.pbc, wire.positions)
    with pytest.raises(GeometryError, match="a molecule or cluster in a box"):
        classify(M @ np.diag([15.0, 15, 15]), True, [[7, 7, 7], [7, 7, 8.1]])


def test_gaps_are_periodic_and_vectorised():
    cell, pos = _layer_on_axis(2, vacuum=15.0)
    shifted = pos + 0.49 * cell[2]                     # layer straddles the cell boundary
    g1, g2 = vacuum_gaps(cell, pos), vacuum_gaps(cell, shifted)
    np.testing.assert_allclose(g1, g2, atol=1e-9)
    many = vacuum_gaps(np.stack([cell, cell]), np.stack([pos, shifted]))
    assert many.shape == (2, 3)


# ---------------------------------------------------------------- in-plane lattice, viewing side
def test_inplane_basis_keeps_lengths_angle_and_is_rotation_invariant():
    cell, _ = _layer_on_axis(2)
    B = inplane_bases(cell, 2)
    a, b = cell[0], cell[1]
    # common practice: an isometry of the plane keeps |a|, |b|, a.b and the area
    assert B[0, 1] == 0.0 and B[0, 0] == pytest.approx(np.linalg.norm(a))
    assert np.linalg.norm(B[1]) == pytest.approx(np.linalg.norm(b))
    assert B[0] @ B[1] == pytest.approx(a @ b)
    assert abs(np.linalg.det(B)) == pytest.approx(np.linalg.norm(np.cross(a, b)))
    for seed in range(5):
        R = _rotation(seed)
        np.testing.assert_allclose(inplane_bases(cell @ R.T, 2), B, atol=1e-12)


def test_viewing_side_sign_convention():
    """A mirrored layer flips the sign of det of the in-plane basis; so does flipping the
    vacuum vector to the other side (common practice: a reflection reverses orientation)."""
    cell, pos = _layer_on_axis(2)
    d0 = np.linalg.det(inplane_bases(cell, 2))
    assert d0 > 0
    mirror = np.diag([-1.0, 1.0, 1.0])                   # reflect through the yz plane
    assert np.linalg.det(inplane_bases(cell @ mirror, 2)) == pytest.approx(-d0)
    flipped = cell.copy()
    flipped[2] *= -1                                     # vacuum vector points down
    assert np.linalg.det(inplane_bases(flipped, 2)) == pytest.approx(-d0)
    assert plane_normals(flipped, 2) @ flipped[2] > 0
    # same for the other axes (cyclic order of the in-plane vectors)
    for axis in (0, 1):
        c, _ = _layer_on_axis(axis)
        assert np.linalg.det(inplane_bases(c, axis)) == pytest.approx(d0)
        c2 = c.copy()
        c2[axis] *= -1
        assert np.linalg.det(inplane_bases(c2, axis)) == pytest.approx(-d0)


def test_viewing_side_is_fixed_by_the_cell_when_it_rotates():
    """pw.x may rotate the cell during vc-relax (../shared/qe-notes.md): the basis follows
    the cell, so a rotation alone never changes the 2D basis or its sign."""
    cell, _ = _layer_on_axis(2)
    frames = np.stack([cell @ _rotation(s).T for s in range(8)])
    B = inplane_bases(frames, 2)
    np.testing.assert_allclose(B, np.broadcast_to(inplane_bases(cell, 2), B.shape), atol=1e-12)


def test_generated_vasp_slab_trajectory():
    """tests/vasp_gen.py slab (18 Å cell): a layer along axis 2; the 2D basis of each frame
    keeps the lengths of the generator's a and b."""
    t = vasp_gen.drifting_layer(6)
    g = classify(t.cells, [True] * 3, t.positions)
    assert (g.dimension, g.vacuum_axis) == (2, 2)
    B = inplane_bases(t.cells, g.vacuum_axis)
    np.testing.assert_allclose(np.linalg.norm(B, axis=2),
                               np.linalg.norm(t.cells[:, :2], axis=2), rtol=1e-12)


@pytest.mark.skipif(not (QE / "layer_oblique_to_hex" / "pw.out").exists(),
                    reason="no pw.x layer output yet")
def test_real_pwx_layer_is_a_layer_with_constant_viewing_side():
    """Real pw.x vc-relax of an invented layer (cell_dofree='2Dxy', 16 Å cell, pbc all True
    as pw.x writes them): detected by the vacuum gap along axis 2, viewed from +c."""
    from driftwatch.adapters import read_run
    run = read_run(QE / "layer_oblique_to_hex")
    g = classify(run.cells, run.pbc, run.positions)
    assert (g.dimension, g.vacuum_axis) == (2, 2)
    assert g.viewing_side @ run.cells[0, 2] > 0
    dets = np.linalg.det(inplane_bases(run.cells, 2))
    assert np.all(dets > 0)                            # 2Dxy keeps c: no change of side


# ---------------------------------------------------------------- layers in bulk
def _bilayer():
    """An invented carbon bilayer crystal: two oblique honeycomb-like layers, 3.5 Å apart."""
    a = np.array([2.52, 0.0, 0.0])
    b = np.array([-1.18, 2.16, 0.0])
    c = np.array([0.25, 0.15, 7.0])
    frac = np.array([[0, 0, 0.20], [0.36, 0.64, 0.20], [0.30, 0.05, 0.70], [0.66, 0.69, 0.70]])
    cell = np.array([a, b, c])
    return cell, frac @ cell, np.full(4, 6)


def test_layers_in_a_stacked_bilayer_match_ase_isolation():
    cell, pos, num = _bilayer()
    layers = find_layers(cell, pos, num)
    assert [L.indices.tolist() for L in layers] == [[0, 1], [2, 3]]
    # ASE's isolate_components finds the same two 2D components with the same in-plane cell
    iso = isolate_components(Atoms(numbers=num, positions=pos, cell=cell, pbc=True))["2D"]
    assert len(iso) == 2
    ase_area = sorted(np.linalg.norm(np.cross(*x.cell.array[:2])) for x in iso)
    ours = sorted(abs(np.linalg.det(L.basis)) for L in layers)
    np.testing.assert_allclose(ours, ase_area, rtol=1e-12)
    np.testing.assert_allclose(ours, np.linalg.norm(np.cross(cell[0], cell[1])), rtol=1e-12)
    for L in layers:
        assert L.normal @ cell[2] > 0 and np.linalg.det(L.basis) > 0
        np.testing.assert_allclose(sorted(np.linalg.norm(L.vectors, axis=1)),
                                   sorted(np.linalg.norm(iso[0].cell.array[:2], axis=1)))
    assert layers[0].height < layers[1].height
    bases = layers_in_bulk(cell, pos, num)
    assert len(bases) == 2 and bases[0].shape == (2, 2)


def test_layered_bulk_from_ase_builder_and_non_layered_bulk():
    """ASE's mx2 builder stacked into a bulk cell (a fact of the trade: MX2 layers are 2D
    components); diamond Si (ASE bulk) has none."""
    layer = mx2("MoS2", a=3.18, thickness=3.19, vacuum=0.0)
    cell = layer.cell.array.copy()
    cell[2] = [0.0, 0.0, 6.2]
    pos = layer.positions - layer.positions[:, 2].min() + [0, 0, 1.0]
    got = layers_in_bulk(cell, pos, layer.numbers)
    assert len(got) == 1
    assert abs(np.linalg.det(got[0])) == pytest.approx(np.linalg.norm(np.cross(cell[0], cell[1])))
    si = bulk("Si", "diamond", a=5.43)
    assert layers_in_bulk(si.cell.array, si.positions, si.numbers) == []


# ------------------------------------------------------------------ closest pair (same-site check)
def _ase_closest(cell, frac, pbc, cutoff):
    """Reference: ASE's own neighbour list (ase.neighborlist.primitive_neighbor_list)."""
    from ase.neighborlist import primitive_neighbor_list
    wrapped = np.where(pbc, frac - np.floor(frac), frac)
    i, j, d = primitive_neighbor_list("ijd", pbc, cell, wrapped @ cell, cutoff,
                                      self_interaction=False)
    keep = i < j
    return None if not keep.any() else float(d[keep].min())


@pytest.mark.parametrize("seed", range(40))
def test_closest_pair_equals_ase_neighbour_list(seed):
    """geometry._closest_pair against ASE's neighbour list on random cells: skewed, flat, layers
    (one axis not periodic), tiny cells where the cutoff spans several images, and planted
    near-duplicates across the cell boundary."""
    rng = np.random.default_rng(seed)
    n = int(rng.integers(2, 120)) if seed % 5 else int(rng.integers(201, 400))
    cell = np.diag(rng.uniform(2.0, 12.0, 3)) + rng.uniform(-4, 4, (3, 3)) * (seed % 3 > 0)
    if abs(np.linalg.det(cell)) < 1.0:
        cell += 3.0 * np.eye(3)
    cell *= max(1.0, (8.0 * n / abs(np.linalg.det(cell))) ** (1 / 3))    # >= 8 Å^3 per atom
    pbc = np.array([True, True, seed % 4 != 3])
    frac = rng.uniform(-1.5, 2.5, (n, 3))
    for _ in range(int(rng.integers(0, 4))):        # near-duplicates, some a cell image apart
        a, b = rng.choice(n, 2, replace=False)
        frac[b] = frac[a] + rng.normal(0, 0.01, 3) + rng.integers(-1, 2, 3) * pbc
    cutoff = float(rng.choice([0.1, 0.5, 1.5, 2.5] if n <= 200 else [0.1, 0.5]))
    got = geometry._closest_pair(cell, frac, pbc, cutoff)
    want = _ase_closest(cell, frac, pbc, cutoff)
    if want is None:
        assert got is None
    else:
        i, j, d = got
        assert i < j and d == pytest.approx(want, abs=1e-9)
        diff = (frac[j] - frac[i]) @ cell                # the pair named is that far apart
        assert d <= np.linalg.norm(diff) + 1e-9


def test_a_gap_just_above_the_threshold_is_printed_with_the_digits_that_show_it():
    """A one-plane cell of c = 6 A that a code prints in other units reads back as 6.0000001 A,
    just above the default vacuum_gap of 6 A (a pw.x field trial: alat units). The reason had said
    'empty gap 6.00 A > 6.0 A'; it now prints as many decimals as tell the two apart."""
    from driftwatch import geometry
    cell = np.diag([3.0, 3.0, 6.000000104575834])[None]
    pos = np.array([[[0.0, 0.0, 1.0], [1.5, 1.5, 1.0]]])
    geo = geometry.classify(cell, np.array([True, True, True]), pos, gap=6.0)
    assert geo.dimension == 2 and geo.reason.startswith("layer: empty gap 6.00000010 Å > 6.0 Å")
