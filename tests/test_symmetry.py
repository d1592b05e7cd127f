"""Tests for driftwatch.symmetry (the spglib wrapper).

Sources: spglib's own verdicts (direct ``spglib.get_symmetry_dataset`` / layer-dataset calls, not
through driftwatch), International Tables facts (fcc Al Fm-3m 225, diamond Si Fd-3m 227, Pearson
symbols of their lattices), ASE's 2D Bravais classification, and closed forms derived in comments.
"""
import math
import os
import subprocess
import sys
import warnings

import numpy as np
import pytest
import spglib
from ase.build import bulk, mx2
from ase.cell import Cell

from driftwatch import symmetry as S
from driftwatch.errors import ConfigError, LatticeError, SymmetryError


# ---------------------------------------------------------------- direct spglib (the reference)
def spg_group(cell, positions, numbers, symprec, layer_axis=None):
    """spglib's group number straight from spglib (no driftwatch code), 0 on failure."""
    frac = np.linalg.solve(np.asarray(cell).T, np.asarray(positions).T).T
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DeprecationWarning)
        try:
            if layer_axis is None:
                ds = spglib.get_symmetry_dataset((cell, frac, numbers), symprec=symprec)
            else:
                ds = spglib.get_symmetry_layerdataset((cell, frac, numbers), layer_axis, symprec)
        except spglib.error.SpglibError:
            return 0, 0
    return (0, 0) if ds is None else (ds.number, len(ds.rotations))


def spg_lattice_number(cell, symprec):
    return spg_group(cell, [[0.0, 0.0, 0.0]], [1], symprec)[0]


def rattled_si(reps=(1, 2, 3), amp=0.003, seed=7):
    atoms = bulk("Si", "diamond", a=5.43, cubic=True).repeat(reps)
    atoms.rattle(amp, seed=seed)
    return atoms.cell[:], atoms.get_positions(), atoms.numbers


def check_brackets(spec, cell, positions, numbers):
    """Every group breakpoint is a real change: spglib gives `from` at `low` and `to` at `high`
    (source: spglib called directly). Points just outside a bracket are not checked: spglib's
    verdict has narrow islands near a change (seen here: P1 windows ~0.3% wide in symprec between
    P-1 and Fd-3m), so a neighbouring bracket can start right at `high`."""
    group_bps = [b for b in spec["breakpoints"] if b["kind"] == "group"]
    for b in group_bps:
        assert b["high"] / b["low"] <= spec["precision"] * (1 + 1e-12)
        assert spg_group(cell, positions, numbers, b["low"]) == (b["from"], b["from_operations"])
        assert spg_group(cell, positions, numbers, b["high"]) == (b["to"], b["to_operations"])
    # every change between grid neighbours has at least one breakpoint inside it
    grid = spec["symprec"]
    for i in range(len(grid) - 1):
        if (spec["group"][i], spec["operations"][i]) != (spec["group"][i + 1], spec["operations"][i + 1]):
            assert any(grid[i] <= b["low"] and b["high"] <= grid[i + 1] for b in group_bps)
    return group_bps


# ---------------------------------------------------------------- handbook facts
def test_fcc_al_and_diamond_si_handbook_groups():
    # International Tables: fcc Al is Fm-3m (225), diamond Si is Fd-3m (227); both lattices are cF.
    for atoms, number in ((bulk("Al", "fcc", a=4.05), 225), (bulk("Si", "diamond", a=5.43), 227)):
        spec = S.spectrum(atoms.cell[:], atoms.get_positions(), atoms.numbers)
        assert set(spec["group"]) == {number}
        assert set(spec["lattice"]) == {"cF"}
        assert spec["breakpoints"] == [] and spec["failures"] == []
        assert len(spec["symprec"]) == 17 and spec["symprec"][0] == pytest.approx(1e-5)
        assert spec["symprec"][-1] == pytest.approx(0.3)
        assert spec["spglib_version"] == spglib.__version__


def test_pearson_symbols_of_one_atom_cells_match_handbook_and_ase():
    # Pearson symbols of the 14 Bravais lattices (International Tables), cells built by ASE's
    # bravais-lattice classes; ASE's own classification names the same lattice.
    from ase.lattice import (BCC, BCT, CUB, FCC, HEX, MCL, MCLC, ORC, ORCC, ORCF, ORCI, RHL,
                             TET, TRI)
    cases = [(CUB(3.0), "cP"), (FCC(3.0), "cF"), (BCC(3.0), "cI"), (TET(3.0, 4.0), "tP"),
             (BCT(3.0, 4.0), "tI"), (ORC(3.0, 4.0, 5.0), "oP"), (ORCF(3.0, 4.0, 5.0), "oF"),
             (ORCI(3.0, 4.0, 5.0), "oI"), (ORCC(3.0, 4.0, 5.0), "oS"), (HEX(3.0, 5.0), "hP"),
             (RHL(3.0, 70.0), "hR"), (MCL(3.0, 4.0, 5.0, 80.0), "mP"),
             (MCLC(3.0, 4.0, 5.0, 70.0), "mS"), (TRI(3.0, 4.0, 5.0, 70.0, 80.0, 85.0), "aP")]
    for lat, pearson in cases:
        cell = lat.tocell()[:]
        spec = S.spectrum(cell, [[0.0, 0.0, 0.0]], [1], symprecs=[1e-5, 1e-3])
        assert spec["lattice"] == [pearson, pearson], lat
        # ASE agrees (ASE writes the side-centred types oC/mC; International Tables' oS/mS)
        assert Cell(cell).get_bravais_lattice().pearson_symbol.replace("C", "S") == pearson


def test_2d_lattice_types_of_one_atom_slabs_match_ase():
    # ASE's 2D Bravais classification (Cell.get_bravais_lattice with pbc=[1,1,0]) names the type.
    ase_name = {"tp": "SQR", "hp": "HEX2D", "op": "RECT", "oc": "CRECT", "mp": "OBL"}
    inplane = {"tp": [[3, 0], [0, 3]], "hp": [[3, 0], [1.5, 1.5 * math.sqrt(3)]],
               "op": [[3, 0], [0, 4]], "oc": [[3, 0], [1.0, math.sqrt(8.0)]],
               "mp": [[3, 0], [0.7, 4.1]]}
    for kind, (a, b) in inplane.items():
        flat = np.array([[a[0], a[1], 0.0], [b[0], b[1], 0.0], [0.0, 0.0, 0.0]])
        assert Cell(flat).get_bravais_lattice(pbc=[1, 1, 0]).name == ase_name[kind]
        for axis in (0, 1, 2):  # the vacuum axis may be any cell axis
            cell = np.array([flat[0], flat[1], [0.0, 0.0, 15.0]])
            order = [(axis + 1) % 3, (axis + 2) % 3, axis]
            cell = cell[np.argsort(order)]
            spec = S.spectrum(cell, [[0.0, 0.0, 7.5]], [1], symprecs=[1e-4, 1e-2], vacuum_axis=axis)
            assert spec["lattice"] == [kind, kind], (kind, axis)


# ---------------------------------------------------------------- spectra and breakpoints
def test_breakpoints_of_rattled_si_bracket_real_changes():
    cell, pos, num = rattled_si()
    spec = S.spectrum(cell, pos, num)
    bps = check_brackets(spec, cell, pos, num)
    assert bps, "a rattled crystal must change verdict somewhere between 1e-5 and 0.3 Å"
    assert spec["group"][0] == 1 and spec["group"][-1] == 227  # spglib at the grid ends
    assert spec["group"] == [spg_group(cell, pos, num, s)[0] for s in spec["symprec"]]  # spglib


def test_strained_fcc_lattice_breakpoint_and_strain():
    # fcc conventional cell with c stretched by (1 + eps): body-centred tetragonal lattice (tI) at
    # small symprec, cF at large symprec (International Tables lattice types; spglib decides where).
    eps = 2e-3
    atoms = bulk("Al", "fcc", a=4.05)  # primitive cell: its one-atom lattice is the fcc lattice
    atoms.set_cell(atoms.cell[:] @ np.diag([1, 1, 1 + eps]), scale_atoms=True)
    cell, pos, num = atoms.cell[:], atoms.get_positions(), atoms.numbers
    spec = S.spectrum(cell, pos, num)
    assert spec["lattice"][0] == "tI" and spec["lattice"][-1] == "cF"
    lat_bps = [b for b in spec["breakpoints"] if b["kind"] == "lattice"]
    assert [(b["from"], b["to"]) for b in lat_bps] == [("tI", "cF")]
    b = lat_bps[0]
    assert b["high"] / b["low"] <= 1.02
    # spglib directly, one-atom cell: I4/mmm (139) below, Fm-3m (225) above
    assert spg_lattice_number(cell, b["low"]) == 139 and spg_lattice_number(cell, b["high"]) == 225
    check_brackets(spec, cell, pos, num)
    # Strain to Fm-3m: the cubic average of diag(a², a², a²(1+eps)²) is m I with
    # m = a²(2 + (1+eps)²)/3 (derived: the group average of a metric over m-3m is isotropic);
    # Green-Lagrange eigenvalues ((m/a²) - 1)/2 twice and (m/(a²(1+eps)²) - 1)/2 once.
    d = S.displacement_to_group(cell, pos, num, symprec=0.1)
    assert d["group"] == 225
    m = (2 + (1 + eps) ** 2) / 3
    expected = 0.5 * math.sqrt(2 * (m - 1) ** 2 + (m / (1 + eps) ** 2 - 1) ** 2)
    assert d["strain"] == pytest.approx(expected, rel=1e-9)
    assert d["max"] < 1e-12  # fractional positions are already the fcc ones


def test_warm_start_and_cache():
    # reuse must not change answers: brackets re-checked against spglib (check_brackets)
    cell, pos, num = rattled_si()
    first = S.spectrum(cell, pos, num)
    again = S.spectrum(cell, pos, num)
    assert again["calls"] == 0 and again["group"] == first["group"]  # cached exact frame
    again["group"][0] = -1
    assert S.spectrum(cell, pos, num)["group"][0] == first["group"][0]  # callers get copies
    pos2 = pos + 1e-5 * np.random.default_rng(3).standard_normal(pos.shape)
    cold = S.spectrum(cell, pos2, num, precision=1.0201)  # different key: no cache hit
    warm = S.spectrum(cell, pos2, num, previous=first)
    assert warm["group"] == cold["group"]
    check_brackets(warm, cell, pos2, num)  # warm brackets are verified spglib changes too
    assert warm["calls"] <= cold["calls"]


def test_no_bisection_and_custom_grid():
    cell, pos, num = rattled_si()
    spec = S.spectrum(cell, pos, num, symprecs=[0.1, 1e-4, 1e-2], bisect=False)
    assert spec["symprec"] == [1e-4, 1e-2, 0.1] and spec["breakpoints"] == []
    assert spec["group"] == [spg_group(cell, pos, num, s)[0] for s in spec["symprec"]]  # spglib


def test_bad_arguments():
    # our own contract (errors.py types, one-line messages naming the key); common practice
    cell, pos, num = rattled_si((1, 1, 1))
    with pytest.raises(ConfigError, match="symprecs"):
        S.spectrum(cell, pos, num, symprecs=[0.1, -1.0])
    with pytest.raises(ConfigError, match="precision"):
        S.spectrum(cell, pos, num, precision=1.0)
    with pytest.raises(LatticeError):
        S.spectrum(np.zeros((3, 3)), pos, num)


# ---------------------------------------------------------------- spglib failures
def duplicated_al():
    atoms = bulk("Al", "fcc", a=4.05, cubic=True)
    pos = atoms.get_positions()
    pos[1] = pos[0]
    return atoms.cell[:], pos, atoms.numbers


@pytest.mark.parametrize("mode", ["returns None", "raises SpglibError"])
def test_two_atoms_at_one_place_are_recorded_failures_in_both_modes(monkeypatch, mode):
    # spglib's message for this input is "too close distance between atoms" (spglib, checked here
    # by calling it with exceptions on); in the old mode driftwatch recovers that text too.
    monkeypatch.delenv("SPGLIB_OLD_ERROR_HANDLING", raising=False)
    monkeypatch.setattr(spglib.error, "OLD_ERROR_HANDLING", mode == "returns None")
    S.clear_cache()  # otherwise the other mode's cached spectrum would be returned
    assert S.versions()["error_mode_now"] == mode
    before = dict(S.versions()["failures_seen"])
    cell, pos, num = duplicated_al()
    spec = S.spectrum(cell, pos, num, symprecs=[1e-4, 1e-2, 0.3])
    assert spec["group"] == [0, 0, 0]
    assert spec["lattice"] == ["cP"] * 3  # the lattice alone is fine (simple cubic cell)
    assert [f["symprec"] for f in spec["failures"]] == spec["symprec"]
    assert all("too close" in f["message"] for f in spec["failures"])
    seen = S.versions()["failures_seen"]
    key = "returned_none" if mode == "returns None" else "raised"
    assert seen[key] >= before[key] + 3
    with pytest.raises(SymmetryError, match="too close"):
        S.displacement_to_group(cell, pos, num, symprec=0.01)


def test_error_mode_set_by_environment_and_by_ase_in_a_subprocess():
    # ASE's symmetry code sets SPGLIB_OLD_ERROR_HANDLING=false for the whole process (ASE source,
    # ase/utils spglib_new_errorhandling); a plain env var does the same. Both in a child process.
    code = (
        "import numpy as np\n"
        "from ase.build import bulk\n"
        "from ase.spacegroup.symmetrize import check_symmetry\n"
        "from driftwatch import symmetry as S\n"
        "check_symmetry(bulk('Cu'), 1e-3)\n"
        "a = bulk('Al', 'fcc', a=4.05, cubic=True); p = a.get_positions(); p[1] = p[0]\n"
        "s = S.spectrum(a.cell[:], p, a.numbers, symprecs=[1e-3, 1e-1])\n"
        "v = S.versions()\n"
        "assert s['group'] == [0, 0], s\n"
        "assert v['failures_seen']['raised'] >= 2, v\n"
        "print(v['error_mode_now'])\n"
    )
    root = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))
    for extra in ({}, {"SPGLIB_OLD_ERROR_HANDLING": "0"}):
        env = {k: v for k, v in os.environ.items() if k != "SPGLIB_OLD_ERROR_HANDLING"}
        env.update(extra, PYTHONPATH=root + os.pathsep + env.get("PYTHONPATH", ""))
        out = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True, text=True,
                             timeout=120)
        assert out.returncode == 0, out.stderr
        assert out.stdout.strip() == "raises SpglibError"


def test_no_deprecation_warning_leaks():
    # spglib 2.8 warns on every call in its old error mode (spglib/error.py, read here); only
    # that warning is silenced, and only around our calls
    atoms = bulk("Si", "diamond", a=5.43)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        S.spectrum(atoms.cell[:] * 1.0001, atoms.get_positions(), atoms.numbers, symprecs=[1e-3])
    assert not [w for w in caught if "OLD_ERROR_HANDLING" in str(w.message)]


# ---------------------------------------------------------------- displacement to a group
@pytest.mark.parametrize("vacuum_axis", [None, 2])
def test_displacement_to_p1_is_zero_as_the_projection_gives(vacuum_axis):
    """Where spglib finds only the identity (P1 / layer group p1, its dataset with one operation),
    the displacement is answered without projecting: zero, as the Reynolds average over the
    identity alone gives (checked here through the general projection on the same structure)."""
    rng = np.random.default_rng(7)
    cell = np.diag([4.1, 4.6, 5.3]) + rng.normal(scale=0.2, size=(3, 3))
    if vacuum_axis is not None:
        cell[2] = [0.0, 0.0, 21.0]
        cell[:2, 2] = 0.0
    frac = rng.random((7, 3)) * ([1, 1, 0.2] if vacuum_axis is not None else 1)
    pos, numbers = frac @ cell, [8, 8, 22, 22, 22, 3, 8]
    d = S.displacement_to_group(cell, pos, numbers, symprec=1e-4, vacuum_axis=vacuum_axis)
    assert d["group"] == 1 and d["operations"] == 1 and d["complete"]       # spglib: P1 / p1
    assert d["rms"] == d["max"] == d["strain"] == 0.0 and d["max_atom"] == 0
    lattice, f, nums = S._prepare(cell, pos, numbers, vacuum_axis)
    _, rot, _, shift, complete = S._projection(lattice, f, nums, 1e-4, -1.0, vacuum_axis is not None)
    assert len(rot) == 1 and complete and not shift.any()
    assert S._strain_norm(lattice, rot, vacuum_axis is not None) < 1e-15


def test_one_moved_atom_in_fcc_known_displacement():
    # 32-atom fcc Al supercell, atom 0 moved by delta along u. Under the full Fm-3m group with the
    # 32 lattice translations, the Reynolds average sends any nearby configuration to the ideal
    # fcc arrangement (the point-group average of a displacement vanishes: m-3m contains -1), and
    # the best uniform shift is the mean displacement delta*u/N (least squares). So the moved atom
    # must move delta*(N-1)/N, each other atom delta/N: max = delta*(N-1)/N, rms = delta*sqrt(N-1)/N.
    atoms = bulk("Al", "fcc", a=4.05, cubic=True).repeat(2)
    n, delta = len(atoms), 0.01
    u = np.array([1.0, 2.0, 3.0]) / math.sqrt(14.0)
    pos = atoms.get_positions()
    pos[0] += delta * u
    d = S.displacement_to_group(atoms.cell[:], pos, atoms.numbers, symprec=5 * delta)
    assert d["group"] == 225 and d["symbol"] == "Fm-3m"  # International Tables: fcc is Fm-3m
    assert d["max"] == pytest.approx(delta * (n - 1) / n, rel=1e-9)
    assert d["rms"] == pytest.approx(delta * math.sqrt(n - 1) / n, rel=1e-9)
    assert d["max_atom"] == 0 and d["strain"] < 1e-12 and d["complete"]
    # below delta/2 spglib cannot see Fm-3m (spglib directly): the moved atom breaks it
    assert spg_group(atoms.cell[:], pos, atoms.numbers, delta / 4)[0] != 225
    # rigid rotation and a unimodular change of cell basis leave the numbers unchanged
    rot = np.linalg.qr(np.random.default_rng(0).standard_normal((3, 3)))[0]
    d_rot = S.displacement_to_group(atoms.cell[:] @ rot.T, pos @ rot.T, atoms.numbers, symprec=5 * delta)
    unimodular = np.array([[1, 1, 0], [0, 1, 0], [0, 2, 1]])
    d_basis = S.displacement_to_group(unimodular @ atoms.cell[:], pos, atoms.numbers, symprec=5 * delta)
    for other in (d_rot, d_basis):
        assert other["group"] == 225
        assert other["max"] == pytest.approx(d["max"], rel=1e-9)
        assert other["rms"] == pytest.approx(d["rms"], rel=1e-9)


def test_symmetrized_structure_is_exactly_symmetric_in_a_nonconforming_supercell():
    # Primitive diamond Si doubled along one vector: the supercell lattice lacks most cubic
    # operations, so spglib lists only some in the input cell, yet the group is Fd-3m. The
    # symmetrised structure must have the whole group: spglib at a tiny symprec finds 227.
    atoms = bulk("Si", "diamond", a=5.43).repeat((1, 1, 2))
    atoms.rattle(0.004, seed=5)
    cell, pos, num = atoms.cell[:], atoms.get_positions(), atoms.numbers
    d = S.displacement_to_group(cell, pos, num, symprec=0.05)
    assert d["group"] == 227 and d["complete"]
    new_cell, new_pos, group = S.symmetrize(cell, pos, num, symprec=0.05)
    assert group == 227 and spg_group(new_cell, new_pos, num, 1e-6)[0] == 227  # spglib
    moved = np.linalg.norm(new_pos - pos, axis=1)  # the same lattice orientation, small strain
    assert moved.max() < 0.05
    assert d["rms"] <= 0.004 * math.sqrt(3)  # rattle is N(0, 0.004) per component (ASE docs)


def test_drift_table_covers_every_group_seen():
    # groups seen = spglib's verdicts on the grid and at bracket ends (spglib via spectrum);
    # P1 needs no displacement (common practice: every structure has the identity)
    cell, pos, num = rattled_si()
    spec = S.spectrum(cell, pos, num)
    table = S.drift_table(cell, pos, num, spec)
    seen = set(spec["group"]) | {b[k] for b in spec["breakpoints"] if b["kind"] == "group"
                                 for k in ("from", "to")}
    assert set(table) == {str(g) for g in seen if g}
    for key, entry in table.items():
        assert entry["group"] == int(key)
        assert entry["rms"] <= entry["max"] + 1e-15
        assert entry["rms"] >= 0 and entry["strain"] >= 0
    assert table["1"]["max"] == 0.0  # P1: nothing to move
    assert table["227"]["max"] > 0.0


def test_shortcuts_of_the_projection_equal_the_general_steps():
    # (1) rows deduplicated in a dict equal numpy's unique-then-sort, -0.0 counted as 0.0 (numpy's
    # reference); (2) the identity as the only pure translation leaves every atom its own class,
    # the same bits as averaging over it with the general matcher; (3) the cached database
    # operations equal spglib's own answer for the Hall number, and cannot be modified.
    rng = np.random.default_rng(7)
    for _ in range(50):
        rows = rng.integers(-1, 2, size=(int(rng.integers(1, 60)), 9)).astype(float)
        rows[rng.random(rows.shape) < 0.2] *= -0.0          # some entries become -0.0
        _, first = np.unique(rows, axis=0, return_index=True)
        assert S._first_of_each(rows).tolist() == np.sort(first).tolist()
    cell, pos, num = rattled_si()
    lattice, frac, nums = S._prepare(cell, pos, num, None)
    T = np.zeros((1, 3))
    y, rep = S._translation_average(frac, nums, lattice, T, np.eye(3), None)
    y_ref, orbit, _ = S._average(frac, nums, lattice, np.eye(3)[None], T, np.eye(3))
    assert y.tobytes() == y_ref.tobytes() and rep.tolist() == orbit.min(axis=0).tolist()
    # Hall numbers of P1, Pa-3, Fm-3m and Fd-3m origin choice 1 (spglib.get_spacegroup_type)
    for hall in (1, 501, 523, 525):
        db = spglib.get_symmetry_from_database(hall)
        rot, tr = S._database_operations(hall)
        assert np.array_equal(rot, db["rotations"]) and np.array_equal(tr, db["translations"])
        with pytest.raises(ValueError):
            rot[0, 0, 0] = 2.0


def test_cached_setting_and_translation_basis_equal_the_direct_formulas():
    # The group's operations in the input basis (W = P^-1 W_s P, w = P^-1 (W_s p + w_s - p),
    # one per distinct W) and the lattice basis of the pure translations are cached on their
    # exact inputs; each frame's own origin shift p still enters w. Checked against the formulas
    # computed directly, on a rattled Si supercell (space group), a MoS2 sheet and its
    # rectangular (orthohexagonal) supercell (layer groups), at three symprecs each, the second
    # round answered from the caches. The cached arrays cannot be modified.
    from ase.build import make_supercell
    sheet = mx2("MoS2", vacuum=8.0)
    rect = make_supercell(sheet, np.array([[1, 0, 0], [1, 2, 0], [0, 0, 1]]))
    rect.rattle(0.002, seed=3)
    cases = [(*rattled_si(), None), (sheet.cell[:], sheet.positions, sheet.numbers, 2),
             (rect.cell[:], rect.positions, rect.numbers, 2)]
    for _ in range(2):
        for cell, pos, num, axis in cases:
            lattice, frac, nums = S._prepare(cell, pos, num, axis)
            for symprec in (1e-5, 1e-2, 0.1):
                ds, _ = S._dataset(lattice, frac, nums, symprec, -1.0, axis is not None)
                rs, ts = S._std_operations(ds, axis is not None)
                P = S._snap(np.array(ds.transformation_matrix, dtype=float))
                p = np.array(ds.origin_shift, dtype=float)
                Pinv = S._snap(np.linalg.inv(P))
                rot = np.einsum("ij,kjl,lm->kim", Pinv, rs, P)
                tr = np.einsum("ij,kj->ki", Pinv, np.einsum("kij,j->ki", rs, p) + ts - p)
                _, first = np.unique(np.round(rot, 6).reshape(len(rot), -1), axis=0,
                                     return_index=True)
                first = np.sort(first)
                got_rot, got_tr, complete = S._group_in_input_setting(ds, axis is not None)
                assert complete and got_rot.tobytes() == rot[first].tobytes()
                assert got_tr.tobytes() == tr[first].tobytes()
                with pytest.raises(ValueError):
                    got_rot[0, 0, 0] = 2.0
                T = S._pure_translations(ds)
                n = len(T)
                if n > 1:
                    rows = np.vstack([n * np.eye(3), np.round(T * n)])
                    basis = S._translation_basis(T)
                    assert basis.tobytes() == (S._integer_basis(rows) / n).tobytes()
                    with pytest.raises(ValueError):
                        basis[0, 0] = 2.0
    assert any(len(S._pure_translations(S._dataset(*S._prepare(c, x, z, a), 0.1, -1.0,
                                                    a is not None)[0])) > 1
               for c, x, z, a in cases)           # the translation basis was exercised

# ---------------------------------------------------------------- layers
def layer_along(atoms, axis):
    """The same slab with its vacuum vector as cell axis ``axis`` (cyclic relabelling)."""
    order = [(axis + 1) % 3, (axis + 2) % 3, axis]
    return atoms.cell[:][np.argsort(order)], atoms.get_positions(), atoms.numbers


def test_layer_group_same_for_vacuum_along_a_b_c():
    atoms = mx2("MoS2", vacuum=8.0)
    atoms.rattle(0.002, seed=1)
    specs = [S.spectrum(*layer_along(atoms, axis), vacuum_axis=axis) for axis in (0, 1, 2)]
    for spec in specs[1:]:
        assert spec["group"] == specs[0]["group"] and spec["lattice"] == specs[0]["lattice"]
    assert specs[0]["group_kind"] == "layer" and set(specs[0]["lattice"]) == {"hp"}
    # spglib's layer routine called directly with the vacuum along c gives the same numbers
    cell, pos, num = layer_along(atoms, 2)
    assert specs[0]["group"] == [spg_group(cell, pos, num, s, layer_axis=2)[0]
                                 for s in specs[0]["symprec"]]
    # 2H-MoS2 monolayer: layer group p-6m2, No. 78 (from memory; spglib agrees above)
    assert specs[0]["group"][-1] == 78


def test_layer_displacement_in_orthohexagonal_cell():
    # Rectangular (orthohexagonal) supercell of a hexagonal layer: its lattice lacks the 3-fold
    # axis, but the layer group is still p-6m2 (78); the symmetrised layer must have all of it.
    atoms = mx2("MoS2", vacuum=8.0)
    ortho = np.array([[1, 0, 0], [1, 2, 0], [0, 0, 1]]) @ atoms.cell[:]
    from ase.build import make_supercell
    rect = make_supercell(atoms, np.array([[1, 0, 0], [1, 2, 0], [0, 0, 1]]))
    assert np.allclose(rect.cell[:], ortho)
    rect.rattle(0.003, seed=2)
    cell, pos, num = rect.cell[:], rect.get_positions(), rect.numbers
    results = [S.displacement_to_group(*layer_along(rect, axis), symprec=0.05, vacuum_axis=axis)
               for axis in (0, 1, 2)]
    for r in results:
        assert r["group"] == 78 and r["complete"]
        assert r["max"] == pytest.approx(results[0]["max"], rel=1e-9)
    new_cell, new_pos, group = S.symmetrize(cell, pos, num, symprec=0.05, vacuum_axis=2)
    assert spg_group(new_cell, new_pos, num, 1e-5, layer_axis=2)[0] == 78  # spglib, layer routine
    # "The lattice alone" is the lattice of the cell given: a one-atom orthohexagonal cell is
    # rectangular (ASE: RECT), although the crystal's translation lattice is hexagonal.
    spec = S.spectrum(cell, pos, num, vacuum_axis=2)
    assert set(spec["lattice"]) == {"op"}
    flat = cell.copy()
    flat[2] = 0.0
    assert Cell(flat).get_bravais_lattice(pbc=[1, 1, 0]).name == "RECT"


def test_bisection_finds_every_change_of_a_non_monotonic_verdict():
    # A constructed step function of symprec (not spglib; common practice for testing a search):
    # A up to 1e-3, B up to 2e-3, A again up to 3e-3, then C. The grid ends 1e-4 (A) and 1e-2 (C)
    # differ; bisection meets B inside and reports all three changes, including B -> A (down).
    edges = [(1e-3, "A"), (2e-3, "B"), (3e-3, "A"), (math.inf, "C")]

    def probe(s):
        return next(v for edge, v in edges if s <= edge)

    values, brackets = S._scan(probe, lambda v: v, (1e-4, 1e-2), True, 1.02)
    assert values == ["A", "C"]
    assert [(vlo, vhi) for _, vlo, _, vhi in brackets] == [("A", "B"), ("B", "A"), ("A", "C")]
    for (lo, vlo, hi, vhi), (edge, _) in zip(brackets, edges):
        assert lo <= edge < hi and hi / lo <= 1.02
        assert probe(lo) == vlo and probe(hi) == vhi
    # documented limit: an excursion between two grid points with equal verdicts is not seen
    values, brackets = S._scan(probe, lambda v: v, (1e-4, 2.5e-3), True, 1.02)
    assert values == ["A", "A"] and brackets == []


# ---------------------------------------------------------------- symmetrisation across groups
def _crystals():
    from ase.spacegroup import crystal
    # Built by ASE's space-group generator from International Tables settings; the number used to
    # build each one is what spglib must find (positions are invented, not from any paper).
    return {
        154: crystal(["Si", "O"], basis=[(0.47, 0, 0), (0.41, 0.27, 0.12)], spacegroup=154,
                     cellpar=[4.9, 4.9, 5.4, 90, 90, 120]),  # chiral, trigonal
        166: crystal(["Bi"], basis=[(0, 0, 0.234)], spacegroup=166,
                     cellpar=[4.5, 4.5, 11.8, 90, 90, 120]),  # R-3m, hexagonal axes
        141: crystal(["Ti", "O"], basis=[(0, 0, 0), (0, 0, 0.208)], spacegroup=141,
                     cellpar=[3.78, 3.78, 9.5, 90, 90, 90]),  # two origin choices
        12: crystal(["Al", "O"], basis=[(0.1, 0, 0.3), (0.2, 0.5, 0.1)], spacegroup=12,
                    cellpar=[12.0, 3.0, 5.7, 90, 104, 90]),  # monoclinic C2/m
        62: crystal(["Ca", "Ti", "O", "O"], basis=[(0.0, 0.25, 0.99), (0, 0, 0.5), (0.07, 0.25, 0.48),
                                                    (0.29, 0.04, 0.71)], spacegroup=62,
                    cellpar=[5.4, 7.6, 5.5, 90, 90, 90]),
        194: bulk("Mg", "hcp", a=3.2, c=5.2),
    }


@pytest.mark.parametrize("number", [154, 166, 141, 12, 62, 194])
def test_symmetrize_gives_the_group_exactly(number):
    # rattled, strained, and in a supercell whose lattice lacks some of the operations;
    # spglib at symprec 1e-6 on the symmetrised structure must find the group (spglib).
    from ase.build import make_supercell
    atoms = make_supercell(_crystals()[number], np.array([[1, 1, 0], [0, 1, 0], [0, 0, 2]]))
    strain = np.eye(3) + 5e-4 * np.random.default_rng(number).standard_normal((3, 3))
    atoms.set_cell(atoms.cell[:] @ strain.T, scale_atoms=True)
    atoms.rattle(0.002, seed=number)
    cell, pos, num = atoms.cell[:], atoms.get_positions(), atoms.numbers
    d = S.displacement_to_group(cell, pos, num, symprec=0.03)
    assert d["group"] == number and d["complete"]
    assert 0 < d["rms"] <= d["max"] < 0.02 and 0 < d["strain"] < 0.01
    new_cell, new_pos, group = S.symmetrize(cell, pos, num, symprec=0.03)
    assert group == number and spg_group(new_cell, new_pos, num, 1e-6)[0] == number
    # the symmetric cell is the input one stretched, not rotated: U = sqrt(F^T F) is symmetric
    stretch = np.linalg.solve(cell, new_cell)
    assert np.allclose(stretch, stretch.T, atol=1e-12)


def test_graphene_and_an_invented_oblique_layer():
    from ase.build import graphene
    sheet = graphene(a=2.46, vacuum=7.0)
    spec = S.spectrum(sheet.cell[:], sheet.get_positions(), sheet.numbers, vacuum_axis=2,
                      symprecs=[1e-4, 1e-2])
    # graphene: layer group p6/mmm, No. 80 (from memory); hexagonal 2D lattice (ASE: HEX2D)
    assert spec["group"] == [80, 80] and spec["group_symbol"][0] == "p6/mmm"
    assert spec["lattice"] == ["hp", "hp"]
    # invented two-element oblique layer (no symmetry beyond p1/p-1 possible for its lattice)
    cell = np.array([[3.1, 0.0, 0.0], [0.9, 3.7, 0.0], [0.0, 0.0, 18.0]])
    frac = np.array([[0.0, 0.0, 0.5], [0.37, 0.21, 0.55], [0.63, 0.79, 0.45]])
    pos = frac @ cell
    spec = S.spectrum(cell, pos, [42, 16, 16], vacuum_axis=2, symprecs=[1e-4, 1e-2])
    assert set(spec["lattice"]) == {"mp"}
    assert spec["group"] == [spg_group(cell, pos, [42, 16, 16], s, layer_axis=2)[0]
                             for s in spec["symprec"]]  # spglib
    assert all(g <= 7 for g in spec["group"])  # oblique layer groups are 1-7 (International Tables E)


def test_leaning_vacuum_vector_does_not_change_the_layer_group():
    # A slab's symmetry does not depend on how its vacuum vector leans (it is not a lattice vector
    # of the layer); spglib called directly on the upright cell is the reference.
    atoms = mx2("MoS2", vacuum=8.0)
    atoms.rattle(0.001, seed=2)
    pos, num = atoms.get_positions(), atoms.numbers
    upright = atoms.cell[:]
    leaning = upright.copy()
    leaning[2] = [1.3, 0.7, upright[2, 2]]
    grid = [1e-3, 1e-2, 0.1]
    ref = [spg_group(upright, pos, num, s, layer_axis=2)[0] for s in grid]
    assert ref[-1] == 78  # p-6m2 (from memory), spglib on the upright cell
    spec = S.spectrum(leaning, pos, num, vacuum_axis=2, symprecs=grid)
    assert spec["group"] == ref
    d_up = S.displacement_to_group(upright, pos, num, 0.1, vacuum_axis=2)
    d_lean = S.displacement_to_group(leaning, pos, num, 0.1, vacuum_axis=2)
    assert d_lean["group"] == 78 and d_lean["max"] == pytest.approx(d_up["max"], rel=1e-9)
    new_cell, new_pos, _ = S.symmetrize(leaning, pos, num, 0.1, vacuum_axis=2)
    assert np.allclose(new_cell[2], leaning[2])  # the user's vacuum vector comes back
    assert spg_group(upright, new_pos, num, 1e-5, layer_axis=2)[0] == 78  # spglib


def test_drift_table_for_a_layer_uses_the_layer_group():
    atoms = mx2("MoS2", vacuum=8.0)
    atoms.rattle(0.002, seed=1)
    cell, pos, num = atoms.cell[:], atoms.get_positions(), atoms.numbers
    spec = S.spectrum(cell, pos, num, vacuum_axis=2)
    table = S.drift_table(cell, pos, num, spec, vacuum_axis=2)
    assert "78" in table and table["78"]["symbol"] == "p-6m2"  # layer group, as spglib names it
    with pytest.raises(Exception, match="vacuum_axis"):
        S.drift_table(cell, pos, num, spec, vacuum_axis=0)


def test_lattice_shortcut_agrees_with_asking_spglib_everywhere():
    # The shortcut assumes the lattice verdict stays at the type found at the largest symprec once
    # reached; on these cells spglib, asked at every grid point, agrees.
    eps = 2e-3
    strained = bulk("Al", "fcc", a=4.05)
    strained.set_cell(strained.cell[:] @ np.diag([1, 1, 1 + eps]), scale_atoms=True)
    sheet = mx2("MoS2", vacuum=8.0)
    cases = [(strained.cell[:], strained.get_positions(), strained.numbers, None),
             (*rattled_si(), None),
             (sheet.cell[:], sheet.get_positions(), sheet.numbers, 2)]
    for cell, pos, num, axis in cases:
        fast = S.spectrum(cell, pos, num, vacuum_axis=axis)
        full = S.spectrum(cell, pos, num, vacuum_axis=axis, lattice_shortcut=False)
        assert fast["lattice"] == full["lattice"] and full["lattice_assumed_from"] is None
        lat = lambda spec: [b for b in spec["breakpoints"] if b["kind"] == "lattice"]
        assert lat(fast) == lat(full)
        assert fast["calls"] <= full["calls"]
    assert fast["lattice_assumed_from"] is not None  # the flat MoS2 lattice is hp everywhere


def test_spglib_c_warnings_do_not_reach_the_terminal():
    """A near-fcc Al4 cell (invented, from the benchmark generator) on which spglib 2.8's C code
    prints 'spglib: ssm_get_exact_positions failed.' to stderr at symprec 0.0665 Å and then
    recovers. Through driftwatch nothing reaches stderr; without the module's SPGLIB_WARNING
    default the same call prints (checked first, so the test fails if spglib stops printing)."""
    code = """
import numpy as np, sys
cell = np.array([[4.0173716283, -0.0032609382, -0.0099133546],
                 [-0.0032609382, 4.035694279, 0.0299458273],
                 [-0.0099133546, 0.0299458273, 4.032050166]])
frac = np.array([[-0.0129035574, -0.0026871823, -0.0052851861],
                 [0.0185336113, 0.4888076923, 0.5082698883],
                 [0.5021442183, 0.0049948107, 0.5007640151],
                 [0.5037018101, 0.505821095, -0.0041919343]])
if sys.argv[1] == "raw":
    import spglib
    spglib.get_symmetry_dataset((cell, frac, [13] * 4), symprec=0.06651059775050343)
else:
    from driftwatch import symmetry
    symmetry.spectrum(cell, frac @ cell, [13] * 4, symprecs=[0.06651059775050343], bisect=False)
"""
    env = {k: v for k, v in os.environ.items() if k != "SPGLIB_WARNING"}
    run = lambda mode: subprocess.run([sys.executable, "-W", "ignore", "-c", code, mode], env=env,
                                      capture_output=True, text=True, check=True).stderr
    assert "spglib:" in run("raw")
    assert run("driftwatch") == ""


# ---------------------------------------------------------------- where spglib flickers
DATA = __import__("pathlib").Path(__file__).parent / "data"


def test_flicker_is_swept_so_no_stretch_hides_another_group():
    """A real pw.x vc-relax of one Al atom (tests/data/qe_trials/al1_fcc_vc_relax): spglib's group
    of the final structure alternates between C2/m and R-3m in windows of ~2 % from 1.77e-3 to
    4.5e-3 Å, where grid points ~2x apart all show C2/m (a field trial's dense scan). The stretches
    must hold spglib's group at every point inside them (40 per stretch, spglib called directly)."""
    from driftwatch.adapters import read_run
    from driftwatch.rules import _plateaus
    from driftwatch.track import analyze
    run = read_run(DATA / "qe_trials" / "al1_fcc_vc_relax")
    spec = analyze(run)["frames"][-1]["symmetry"]
    c, p = run.cells[-1], run.positions[-1]
    cell = (c, np.linalg.solve(c.T, p.T).T, run.numbers)
    stretches = _plateaus(spec)
    c2m = next(r for r in stretches if r[2] == 12)
    assert 0.00172 < c2m[1] < 0.001773            # the first R-3m window starts at 1.773e-3 Å
    checked = 0
    for lo, hi, g, _, ops in stretches:
        for x in np.geomspace(lo, hi, 40)[1:-1] if hi > lo else []:
            ds = spglib.get_symmetry_dataset(cell, symprec=x, angle_tolerance=-1)       # spglib
            assert (ds.number, len(ds.rotations)) == (g, ops), (lo, hi, x)
            checked += 1
    assert checked > 500


def test_alternating_runs_are_one_row_for_display():
    from driftwatch.rules import alternating, shown_breakpoints, shown_ranges
    assert alternating(list("ABABAC")) == [(0, 4)]
    assert alternating(list("ABAC")) == []                    # fewer than 4: not a flicker
    ranges = [[1, 2, 12, "C2/m", 4], [2.1, 2.2, 166, "R-3m", 12], [2.3, 2.4, 12, "C2/m", 4],
              [2.5, 2.6, 166, "R-3m", 12], [3, 9, 225, "Fm-3m", 48]]
    rows = shown_ranges(ranges)
    assert rows[0][:2] == [1, 2.6] and rows[0][2] == (12, 166) and rows[0][5] == 4
    assert rows[1] == [3, 9, 225, "Fm-3m", 48, 1]
    bps = [{"kind": "group", "low": lo, "high": hi, "from": a, "to": b}
           for lo, hi, a, b in [(2, 2.1, 12, 166), (2.2, 2.3, 166, 12), (2.4, 2.5, 12, 166),
                                (2.6, 3, 166, 225)]]
    shown = shown_breakpoints(bps)
    assert [(b["low"], b["high"], b["changes"]) for b in shown] == [(2, 2.5, 3), (2.6, 3, 1)]


def test_a_wide_plateau_beside_a_flicker_stays_its_own_row():
    """A stretch at least min_plateau wide is a plateau, never folded into the flicker beside it:
    custodian's genuine VASP NpT MD (tests/data/public/vasp541_npt_md) ends on P1 from 1e-05 to
    0.156 Å (the plateau its advice recommends), then P1 and P-1 alternate up to 0.2 Å. The run
    page had shown one row "P1 and P-1 alternate" from 1e-05 to 0.201 Å; `tolerance` one chain."""
    from driftwatch import analyze
    from driftwatch.adapters import read_run
    from driftwatch.rules import shown_breakpoints, shown_ranges
    ranges = [[1e-5, 0.1, 1, "P1", 1], [0.11, 0.12, 2, "P-1", 2], [0.13, 0.14, 1, "P1", 1],
              [0.15, 0.16, 2, "P-1", 2], [0.17, 0.18, 1, "P1", 1]]
    rows = shown_ranges(ranges)
    assert rows[0] == ranges[0] + [1] and rows[1][:2] == [0.11, 0.18] and rows[1][5] == 4
    assert shown_ranges(ranges, min_plateau=1e5)[0][5] == 5                 # narrower than that
    bps = [{"kind": "group", "low": lo, "high": hi, "from": a, "to": b}
           for lo, hi, a, b in [(0.1, 0.11, 1, 2), (0.12, 0.13, 2, 1), (0.14, 0.15, 1, 2),
                                (0.16, 0.17, 2, 1)]]
    shown = shown_breakpoints(bps, grid=(1e-5, 0.3))
    assert [(b["low"], b["high"], b["changes"]) for b in shown] == [(0.1, 0.11, 1), (0.12, 0.17, 3)]
    assert shown_breakpoints(bps)[0]["changes"] == 4                         # no grid: unknown
    from pathlib import Path
    rec = analyze(read_run(Path(__file__).parent / "data" / "public" / "vasp541_npt_md"))
    tol = rec["summary"]["tolerance"]
    rows = shown_ranges(tol["ranges"], rec["config"]["tolerance"]["min_plateau"])
    plateau = tol["plateau"]
    assert any(r[5] == 1 and r[0] <= plateau["low"] and r[1] == plateau["high"] for r in rows)
    assert any(r[5] > 1 for r in rows)              # the flicker above it is still one row
    lost = next(f["message"] for f in rec["flags"] if f["code"] == "group-lost")
    assert "to P1 (1, 1 operation) from" in lost                  # one operation, not "operations"
    import subprocess
    import sys
    out = subprocess.run([sys.executable, "-m", "driftwatch", "tolerance",
                          str(Path(__file__).parent / "data" / "public" / "vasp541_npt_md")],
                         capture_output=True, text=True, check=True).stdout
    said = [ln for ln in out.splitlines() if ln.startswith("breakpoint")]
    # groups named as every output names them, brackets at 3 significant figures as inspect's
    assert said[0] == (f"breakpoint (group): P1 (1) -> P-1 (2) between {plateau['high']:.3g} and "
                       f"{rows[1][0]:.3g} Å") and "alternate" in said[1]


def test_the_flicker_sweep_runs_only_where_a_verdict_returns():
    """A grid interval holding a chain of different verdicts (P1 -> P2 -> P-42m between two grid
    points, as a relaxed vacancy has) that a few probes confirm is no flicker: it costs those
    probes only; one holding a return (C2/m -> R-3m -> C2/m) is probed around."""
    grid = [1e-3, 2e-3, 4e-3, 8e-3]
    calls = []

    def step_verdicts(edges, names):
        def probe(s):
            calls.append(s)
            return names[sum(s >= e for e in edges)]
        return probe
    mono = step_verdicts([2.5e-3, 3.0e-3], ["P1", "P2", "P-42m"])
    values = [mono(s) for s in grid]
    calls.clear()
    brackets = [(2.4e-3, "P1", 2.52e-3, "P2"), (2.95e-3, "P2", 3.05e-3, "P-42m")]
    assert S._sweep(mono, lambda v: v, grid, values, brackets, 1.05) == brackets
    assert len(calls) == S.SWEEP_PROBES * 3                     # the three stretches, checked
    flick = step_verdicts([2.5e-3, 3.0e-3, 3.5e-3], ["C2/m", "R-3m", "C2/m", "Fm-3m"])
    values = [flick(s) for s in grid]
    brackets = [(2.4e-3, "C2/m", 2.52e-3, "R-3m"), (2.95e-3, "R-3m", 3.05e-3, "C2/m"),
                (3.45e-3, "C2/m", 3.55e-3, "Fm-3m")]
    calls.clear()
    swept = S._sweep(flick, lambda v: v, grid, values, brackets, 1.05)
    assert calls and [b[1::2] for b in swept] == [b[1::2] for b in brackets]


@pytest.mark.parametrize("version, ok", [("2.0.2", False), ("2.5.0", False), ("2.6.0", False),
                                         ("2.7.0", True), ("2.8.0", True), ("2.10.1", True),
                                         ("3.0.0rc1", True)])
def test_spglib_older_than_2_7_is_refused_by_its_version(version, ok):
    """spglib's release versions on PyPI (2.0.2 is Debian 12's python3-spglib): ``spglib.error``
    and ``get_symmetry_layerdataset`` first ship in 2.7.0 (the 2.5.0 and 2.6.0 wheels have
    neither; a field trial's venv failed every run on them). The installed one passes."""
    assert S.spglib_supported(version) is ok
    assert S.spglib_supported(spglib.__version__) and hasattr(spglib, "error")


def test_a_change_below_what_the_file_resolves_is_not_bisected():
    """A real LAMMPS relaxation of a 256-atom Al supercell (tests/data/lammps_trials/
    al256_rattled_eam; positions printed to 6 significant digits, 1e-4 Å): spglib's group of the
    final frame changes P1 -> Fm-3m near 1e-4 Å. With a floor at 2e-4 Å (about twice what the
    file prints), the change keeps its grid interval as its bracket, asks spglib fewer questions,
    and every grid verdict is spglib's own, as without the floor; then the floor the audit itself
    computes (twice run.position_precision) on a grid where the changes fall below it.
    ASE's own LAMMPS dump reader gives the same positions (the reference for the frame)."""
    from ase.io import read
    from driftwatch.adapters import read_run
    path = DATA / "lammps_trials" / "al256_rattled_eam" / "al256_rattled.lammpstrj.gz"
    run = read_run(path)
    ase_last = read(path, -1, format="lammps-dump-text")
    assert np.allclose(ase_last.positions, run.positions[-1], atol=1e-9)
    grid = [1e-05, 2.0883071e-05, 4.3610268e-05, 9.1071633e-05, 1.90185543e-04, 3.9716583e-04,
            1e-3]
    got = {}
    for floor in (0.0, 2e-4):
        S.clear_cache()
        got[floor] = S.spectrum(run.cells[-1], run.positions[-1], run.symmetry_types,
                                       symprecs=grid, floor=floor)
    a, b = got[0.0], got[2e-4]
    assert a["group"] == b["group"] == [1, 1, 1, 1, 225, 225, 225]
    for k, s in enumerate(grid):          # spglib itself, at each grid point
        ds = spglib.get_symmetry_dataset((run.cells[-1], ase_last.get_scaled_positions(),
                                          run.numbers), symprec=s)
        assert ds.number == a["group"][k]
    (ba,), (bb,) = ([x for x in g["breakpoints"] if x["kind"] == "group"] for g in (a, b))
    assert ba["high"] / ba["low"] <= 1.05 and grid[3] <= ba["low"] < ba["high"] <= grid[4]
    assert (bb["low"], bb["high"]) == pytest.approx((grid[3], grid[4]))
    assert b["calls"] < a["calls"]
    # the audit's own floor: twice the dump's printed precision (8.7e-5 Å); on a grid to 0.1 Å
    # the final frame's changes fall in intervals below it and keep them as their brackets
    from driftwatch import config
    from driftwatch.track import analyze, symprec_grid
    cfg = config.load("default", {"symmetry.symprec_max": "0.1 Å"})
    rec = analyze(path, cfg)
    floor = 2 * rec["run"]["position_precision"]
    assert floor == pytest.approx(2 * 8.66e-5, rel=1e-3)
    bps = [x for x in rec["frames"][-1]["symmetry"]["breakpoints"] if x["kind"] == "group"]
    g = symprec_grid(cfg)
    assert bps and all(x["high"] <= floor and any(x["low"] == pytest.approx(u) and
                                                  x["high"] == pytest.approx(v)
                                                  for u, v in zip(g, g[1:])) for x in bps)
