"""The whole pipeline on real pw.x relaxations made here (tests/data/qe/, example_runs/).

spglib's verdicts in these tests come from spglib itself (called here directly), never restated by hand.
"""

import json
from pathlib import Path

import numpy as np
import pytest
import spglib
from ase.io import read

import driftwatch
from driftwatch import config, records, rules, track

QE = Path(__file__).parent / "data" / "qe"


def _spglib_lattice_number(cell, symprec):
    """spglib space group of a one-atom cell with this lattice (its holohedry)."""
    ds = spglib.get_symmetry_dataset((cell, [[0, 0, 0]], [1]), symprec=symprec)
    return ds.number


@pytest.fixture(scope="module")
def hex_record():
    return driftwatch.analyze(QE / "layer_oblique_to_hex")


def test_record_schema_and_per_frame_fields(hex_record):
    rec = hex_record
    assert rec["schema"] == records.SCHEMA
    assert rec["geometry"]["dimension"] == 2
    # the same file read by ASE's own pw.x reader gives the same number of completed steps
    frames_ase = read(QE / "layer_oblique_to_hex" / "pw.out", index=":", format="espresso-out")
    assert rec["run"]["n_frames"] == len(frames_ase)
    for f in rec["frames"]:
        ri = f["root_invariant"]
        assert ri == sorted(ri) and len(ri) == 3
        assert f["sign"] in (-1, 0, 1)
        assert set(f["distance"]) == {"op", "oc", "tp", "hp", "mirror"}
        assert set(f["deformation"]) == set(f["distance"])
    assert "symmetry" in rec["frames"][0] and "symmetry" in rec["frames"][-1]
    json.loads(records.dumps(rec))  # standard JSON


def test_oblique_layer_that_snapped_to_hexagonal_is_flagged(hex_record):
    rec = hex_record
    snap = [f for f in rec["flags"] if f["code"] == "lattice-gained"]
    assert len(snap) == 1 and snap[0]["type"] == "hp"
    k = snap[0]["frame"]
    cells = [a.cell.array for a in read(QE / "layer_oblique_to_hex" / "pw.out", index=":",
                                        format="espresso-out")]
    # spglib (one-atom cell of the same lattice, symprec 1e-3 Å): the first frame is not hexagonal,
    # the flagged frame and the last frame are (P6/mmm, 191, is the holohedry of a hexagonal lattice
    # with its perpendicular vacuum vector; International Tables Vol. A)
    assert _spglib_lattice_number(cells[0], 1e-3) != 191
    assert _spglib_lattice_number(cells[k], 1e-3) == 191
    assert _spglib_lattice_number(cells[-1], 1e-3) == 191
    assert rec["summary"]["verdict"]["direction"] == "gained"
    assert rec["summary"]["verdict"]["lattice"]["gained"] == "hp"
    assert rec["summary"]["verdict"]["lattice"]["from_frame"] == k
    assert rec["summary"]["final"]["type"] == "hp"
    assert rec["summary"]["initial"]["type"] == "mp"


def test_bulk_tetragonal_cell_drifts_to_cubic():
    rec = driftwatch.analyze(QE / "bulk_tetragonal_to_cubic")
    assert rec["geometry"]["dimension"] == 3
    cells = [a.cell.array for a in read(QE / "bulk_tetragonal_to_cubic" / "pw.out", index=":",
                                        format="espresso-out")]
    final_number = _spglib_lattice_number(cells[-1], 1e-3)
    assert final_number >= 195  # spglib: the final lattice is cubic (space groups 195-230)
    assert _spglib_lattice_number(cells[0], 1e-3) < 195  # ... and the first is not
    fin = rec["summary"]["final"]["type"]
    assert fin.startswith("c")
    assert any(f["code"] in ("lattice-gained", "lattice-nearing") for f in rec["flags"])


def test_fixed_cell_run_has_no_lattice_drift_but_atomic_drift():
    rec = driftwatch.analyze(QE / "relax_atoms_to_sites")
    assert rec["run"]["fixed_cell"] is True
    lat = rec["summary"]["verdict"]["lattice"]
    assert lat["fixed_cell"] and lat["direction"] == "kept"
    assert not [f for f in rec["flags"] if f["code"].startswith("lattice-")]
    first, last = rec["frames"][0]["symmetry"], rec["frames"][-1]["symmetry"]
    # spglib itself on the first and last structures read by ASE: the group at 1e-3 Å grows
    atoms = read(QE / "relax_atoms_to_sites" / "pw.out", index=":", format="espresso-out")
    n0 = spglib.get_symmetry_dataset((atoms[0].cell.array, atoms[0].get_scaled_positions(),
                                      atoms[0].numbers), symprec=1e-3).number
    n1 = spglib.get_symmetry_dataset((atoms[-1].cell.array, atoms[-1].get_scaled_positions(),
                                      atoms[-1].numbers), symprec=1e-3).number
    i = int(np.argmin(np.abs(np.log(np.asarray(first["symprec"]) / 1e-3))))
    assert first["group"][i] == n0 and last["group"][i] == n1
    assert n1 != n0
    assert any(f["code"] == "group-gained" for f in rec["flags"])
    st = rec["summary"]["verdict"]["structure"]
    assert (st["initial"]["group"], st["final"]["group"]) == (n0, n1)
    # the step it holds from: spglib on every frame (directly) agrees with the bisection over frames
    numbers = [spglib.get_symmetry_dataset((a.cell.array, a.get_scaled_positions(), a.numbers),
                                           symprec=1e-3).number for a in atoms]
    first = max(i for i, n in enumerate(numbers) if n != n1) + 1
    assert st["from_frame"] == first and st["exact"]


def test_select_flags_by_code_or_what_they_concern():
    flags = [{"code": "lattice-gained", "concerns": "lattice"},
             {"code": "symprec-dependent", "concerns": "tolerance"}]
    assert rules.select(flags, ["lattice-gained"]) == flags[:1]
    assert rules.select(flags, ["tolerance"]) == flags[1:]
    assert rules.select(flags, ["any"]) == flags
    assert rules.select(flags, []) == []


@pytest.mark.parametrize("number,symbol,dim,expected", [
    # International Tables Vol. A: space-group number ranges of the crystal systems and centring letters
    (225, "Fm-3m", 3, "cF"), (229, "Im-3m", 3, "cI"), (221, "Pm-3m", 3, "cP"),
    (139, "I4/mmm", 3, "tI"), (123, "P4/mmm", 3, "tP"), (166, "R-3m", 3, "hR"),
    (191, "P6/mmm", 3, "hP"), (164, "P-3m1", 3, "hP"), (12, "C2/m", 3, "mS"), (2, "P-1", 3, "aP"),
    (65, "Cmmm", 3, "oS"), (38, "Amm2", 3, "oS"), (71, "Immm", 3, "oI"), (69, "Fmmm", 3, "oF"),
    # International Tables Vol. E: layer groups 1-7 oblique, 8-48 rectangular (c = centred),
    # 49-64 square, 65-80 hexagonal
    (1, "p1", 2, "mp"), (37, "pmmm", 2, "op"), (47, "cmmm", 2, "oc"), (61, "p4/mmm", 2, "tp"),
    (80, "p6/mmm", 2, "hp")])
def test_bravais_of_group(number, symbol, dim, expected):
    assert rules.bravais_of_group(number, symbol, dim) == expected


def test_symprec_grid_contains_rule_values():
    cfg = config.load()
    from driftwatch.track import symprec_grid
    grid = symprec_grid(cfg)
    for x in (1e-3, 1e-2, 0.1, 1e-5):
        assert min(abs(np.log(np.asarray(grid) / x))) < 1e-9
    assert grid == sorted(grid) and grid[0] >= 1e-5 and grid[-1] <= 0.3


def test_demo_campaign_shows_every_flag_and_one_layer_stays_chiral():
    """The bundled demo campaign (real pw.x and EMT relaxations made by scripts/make_runs.py) exercises
    every flag at least once, and its stays-oblique layer gets none (spglib itself calls that layer's
    final structure P2/m at every tolerance; checked directly here)."""
    demo = Path(__file__).parent.parent / "example_runs"
    codes, per_run = set(), {}
    for run in sorted(p for p in demo.iterdir() if p.name not in ("README.md", "pseudo")):
        rec = driftwatch.analyze(run)
        per_run[run.name] = {f["code"] for f in rec["flags"]}
        codes |= per_run[run.name]
    assert codes == set(rules.FLAGS)
    stays = "L07_emt_fire.traj"
    assert per_run[stays] == set()
    last = read(demo / stays, index=-1)
    for symprec in (1e-5, 1e-3, 1e-2, 1e-1):
        ds = spglib.get_symmetry_dataset((last.cell.array, last.get_scaled_positions(), last.numbers),
                                         symprec=symprec)
        assert ds.number == 10  # P2/m: no in-plane mirror, the 2D lattice stays oblique
    rec = driftwatch.analyze(demo / stays)
    assert rec["summary"]["final"]["type"] == "mp" and abs(rec["frames"][-1]["chiral_distance"]) > 0.5


def test_record_json_is_what_the_standard_encoder_writes(hex_record):
    # records.dumps converts in one pass; its text must be exactly what Python's own json module
    # writes for the same values once numpy types, tuples and non-finite numbers are made plain
    # (the reference here is the standard library: json.dumps, then json.loads to read it back).
    odd = {"a": np.float64(1.5), "b": [np.int64(3), np.nan, float("inf"), np.float32(0.25)],
           1: "key", 2.5: None, False: (1, np.array([[1.0, np.nan], [2.0, 3.0]])),
           "p": Path("/x"), "ok": np.bool_(True), "s": "é"}
    ref = json.loads(json.dumps(odd, default=lambda o: o.tolist() if hasattr(o, "tolist") else str(o)))

    def finite(x):
        if isinstance(x, float):
            return x if np.isfinite(x) else None
        if isinstance(x, dict):
            return {k: finite(v) for k, v in x.items()}
        if isinstance(x, list):
            return [finite(v) for v in x]
        return x
    for obj, want in ((odd, finite(ref)), (hex_record, finite(json.loads(json.dumps(
            hex_record, default=lambda o: o.tolist()))))):
        assert records.dumps(obj, indent=False) == json.dumps(want, allow_nan=False)
        text = records.dumps(obj)
        assert json.loads(text) == want
        # the layout: one line per item of the top two levels, each deeper value on one line
        # exactly as the standard encoder writes it
        lines = [line.rstrip(",") for line in text.splitlines()]
        assert lines[0] == "{" and lines[-1] == "}"
        for key, value in want.items():
            if not isinstance(value, (dict, list)) or not value:
                assert f" {json.dumps(key)}: {json.dumps(value)}" in lines
                continue
            for k, v in (value.items() if isinstance(value, dict) else enumerate(value)):
                head = f"  {json.dumps(k)}: " if isinstance(value, dict) else "  "
                assert head + json.dumps(v) in lines, (key, k)
    with pytest.raises(TypeError):
        records.dumps({"x": object()})


@pytest.mark.parametrize("path", [QE / "bulk_tetragonal_to_cubic",
                                  Path(__file__).parent.parent / "example_runs" /
                                  "B03_qe_vcrelax_nosym"])
def test_spglib_is_asked_only_what_the_answer_reads(path):
    # real pw.x vc-relax runs made here, one change of spglib's group at 1e-3 Å each (checked
    # below with spglib itself on every frame). The record asks spglib for tolerance spectra on
    # the first and last frames, brackets only on the last (the tolerance advice reads them) and
    # none for the lattice alone; the step of the change is searched at the verdict's symprec only.
    cfg = config.load()
    rec = driftwatch.analyze(path, cfg)
    frames = rec["frames"]
    n = len(frames)
    with_spectrum = [f["index"] for f in frames if f.get("symmetry")]
    assert with_spectrum == [0, n - 1]
    assert not frames[0]["symmetry"]["breakpoints"]
    assert {b["kind"] for b in frames[-1]["symmetry"]["breakpoints"]} <= {"group"}
    assert frames[-1]["symmetry"]["breakpoints"], "the last frame's group changes over the grid"
    at = cfg["rules"]["structure"]["symprec"]
    every = sorted(float(s) for s in {at, *cfg["report"]["common_symprecs"]})
    for f in frames:
        st = f.get("structure")
        if f["index"] in (0, n - 1):
            assert st["symprec"] == every
        elif st:
            assert st["symprec"] == [at]           # probed while locating the change
    # spglib's own answer on every frame (called here directly, its default angle tolerance):
    # the group (number, operations) at the verdict's symprec changes once, at from_frame
    run = read(path / "pw.out", index=":", format="espresso-out")
    series = []
    for atoms in run:
        ds = spglib.get_symmetry_dataset((atoms.cell[:], atoms.get_scaled_positions(wrap=False),
                                          atoms.numbers), symprec=at)
        series.append((ds.number, len(ds.rotations)))
    assert len(series) == n
    changes = [i for i in range(1, n) if series[i] != series[i - 1]]
    assert len(changes) == 1                       # the search's assumption holds here
    st = rec["summary"]["verdict"]["structure"]
    assert st["from_frame"] == changes[0] and st["exact"] is True
    assert (st["initial"]["group"], st["initial"]["operations"]) == series[0]
    assert (st["final"]["group"], st["final"]["operations"]) == series[-1]
    # not every frame was asked, unless every one after the change is cheap (track.RECHECK_COST:
    # B03 is one atom of P-1, all asked)
    cheap = track.RECHECK_COST // (len(run[0]) * st["final"]["operations"]) >= n
    assert rec["timing"]["group_frames"] < n or cheap


def test_a_record_does_not_depend_on_what_ran_before_it_in_the_process():
    """Reading a trajectory with ASE's FixSymmetry constraint (tests/data/ml_trials) switches
    spglib's error mode for the whole process (ASE sets SPGLIB_OLD_ERROR_HANDLING=false); a record
    made after it is the same as one made before (its versions named the mode, so two audits of
    one campaign differed in 5-16 records, by worker order)."""
    import os
    import subprocess
    import sys
    code = ("import json, driftwatch, sys\n"
            "from driftwatch import records\n"
            "path = sys.argv[1]\n"
            "a = records.dumps(driftwatch.analyze(path)['versions'])\n"
            "driftwatch.analyze(sys.argv[2])\n"
            "b = records.dumps(driftwatch.analyze(path)['versions'])\n"
            "print(a == b, a)\n")
    data = Path(__file__).parent / "data"
    env = {k: v for k, v in os.environ.items() if k != "SPGLIB_OLD_ERROR_HANDLING"}
    r = subprocess.run([sys.executable, "-c", code, str(data / "qe" / "bulk_tetragonal_to_cubic"),
                        str(data / "ml_trials" / "al_chgnet_fixsym.traj")], env=env,
                       capture_output=True, text=True, timeout=600)
    assert r.returncode == 0, r.stderr
    assert r.stdout.startswith("True ") and "error_mode" not in r.stdout, r.stdout
