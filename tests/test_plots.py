"""Plots (chart descriptions, their SVG and their matplotlib Figures), fixed styles and record tables.

Sources named beside each check:
* records of real relaxations: pw.x outputs in tests/data/qe (Quantum ESPRESSO from Debian, run here)
  and ASE optimizer trajectories in example_runs/ (ASE's EMT), analysed with driftwatch.analyze;
* the cells those files hold as ASE reads them (ase.io.read, ase.cell.Cell) for the cell parameters;
* spglib's own space-group database (spglib.get_spacegroup_type over the 530 Hall settings) for the
  crystal system of every space-group number; International Tables A (point group -> crystal system,
  the 14 Pearson symbols; the 2D types op, oc, tp, hp) and International Tables E for the layer-group
  number ranges (from memory);
* matplotlib's artist API (Line2D.get_color/get_marker/get_linestyle, Axes.get_legend) and its viridis
  colour map for the Figures;
* the SVG the report embeds, parsed (each series is a ``<g class="mark">``; each legend entry a
  ``<g class="legend-entry">``);
* pandas reading the audit's own campaign.csv for the per-run table.
"""

from __future__ import annotations

import itertools
import math
import re
from pathlib import Path

import numpy as np
import pytest

import driftwatch
from driftwatch import tables
from driftwatch.report import charts, style, svg

ROOT = Path(__file__).resolve().parent.parent
QE = ROOT / "tests" / "data" / "qe"
RUNS = {"qe_bulk": QE / "bulk_tetragonal_to_cubic", "qe_layer": QE / "layer_oblique_to_hex",
        "qe_fixed": QE / "relax_atoms_to_sites",
        "L10": ROOT / "example_runs" / "L10_emt_bfgs_flip.traj",
        "L09": ROOT / "example_runs" / "L09_emt_fixed_square.traj",
        "L06": ROOT / "example_runs" / "L06_emt_bfgs.traj",
        "B07": ROOT / "example_runs" / "B07_emt_fire_path.traj"}


@pytest.fixture(scope="module")
def recs():
    return {k: driftwatch.analyze(p) for k, p in RUNS.items()}


# ------------------------------------------------------------------------------------ SVG parsing

_MARK = re.compile(r'<g class="mark" ([^>]*)>(.*?)</g>', re.S)
_ENTRY = re.compile(r'<g class="legend-entry" ([^>]*)>(.*?)</g>', re.S)
_ATTR = re.compile(r'([\w-]+)="([^"]*)"')


def _marks(text):
    out = []
    for attrs, body in _MARK.findall(text):
        a = dict(_ATTR.findall(attrs))
        pts = re.findall(r'<polyline points="([^"]*)"', body)
        dots = re.findall(r'<path d="([^"]*)"', body)
        out.append({**a, "points": tuple(pts), "dots": tuple(dots), "body": body})
    return out


def _entries(text):
    out = []
    for attrs, body in _ENTRY.findall(text):
        a = dict(_ATTR.findall(attrs))
        a["text"] = re.sub("<[^>]+>", "", body)
        out.append(a)
    return out


def _xy(m):
    return np.array([[float(v) for v in p.split(",")] for run in m["points"] for p in run.split()])


def _within_px(a, b, px):
    pa, pb = _xy(a), _xy(b)
    return pa.shape == pb.shape and np.abs(pa - pb).max() <= px


def _style(m):
    return (m["data-colour"], m["data-marker"], m["data-dash"], m["data-hollow"])


def _charts(recs):
    for name, rec in recs.items():
        for cname, c in charts.run_charts(rec, (1e-5, 1e-3, 1e-2, 0.1)).items():
            if c is not None:
                yield name, cname, c


# ------------------------------------------------------------------------------ style tables

def test_space_group_systems_agree_with_spglib_database():
    # spglib's database: every Hall setting's point group; International Tables A: point group ->
    # crystal system. style.group_system must give that system for the setting's number.
    import spglib
    system_of_pg = {}
    for pgs, system in ((("1", "-1"), "triclinic"), (("2", "m", "2/m"), "monoclinic"),
                        (("222", "mm2", "mmm"), "orthorhombic"),
                        (("4", "-4", "4/m", "422", "4mm", "-42m", "4/mmm"), "tetragonal"),
                        (("3", "-3", "32", "3m", "-3m"), "trigonal"),
                        (("6", "-6", "6/m", "622", "6mm", "-6m2", "6/mmm"), "hexagonal"),
                        (("23", "m-3", "432", "-43m", "m-3m"), "cubic")):
        for pg in pgs:
            system_of_pg[pg] = system
    seen = set()
    for hall in range(1, 531):
        t = spglib.get_spacegroup_type(hall)
        assert style.group_system(t.number) == system_of_pg[t.pointgroup_international], t.number
        seen.add(t.number)
    assert seen == set(range(1, 231))
    assert style.group_system(0) is None and style.group_colour(0) == style.FAILED_COLOUR
    # International Tables E (from memory): layer groups 1-2 triclinic ... 73-80 hexagonal
    assert [style.group_system(n, "layer") for n in (2, 3, 18, 19, 48, 49, 64, 65, 72, 73, 80)] == [
        "triclinic", "monoclinic", "monoclinic", "orthorhombic", "orthorhombic", "tetragonal",
        "tetragonal", "trigonal", "trigonal", "hexagonal", "hexagonal"]


def test_one_style_per_bravais_type():
    # International Tables A: the 14 3D Bravais types (Pearson symbols) and the 5 2D types; each gets
    # its own (colour, marker, dash) within its dimension, and the hue family of its crystal system
    bulk = ["aP", "mP", "mS", "oP", "oS", "oI", "oF", "tP", "tI", "hR", "hP", "cP", "cI", "cF"]
    layer = ["mp", "op", "oc", "tp", "hp", "mirror"]
    for group in (bulk, layer):
        triples = [(style.TYPE_STYLE[t]["colour"], style.TYPE_STYLE[t]["marker"],
                    str(style.TYPE_STYLE[t]["dash"])) for t in group]
        assert len(set(triples)) == len(group)
        assert len({style.TYPE_STYLE[t]["colour"] for t in group}) == len(group)  # colour alone too
    for t in bulk + layer[:-1]:
        assert style.TYPE_STYLE[t]["colour"] in style.SYSTEM_SHADES[style.SYSTEM_OF_TYPE[t]]
    # group colours: the hue family of the group's system (common practice: consistent semantics)
    for n in range(1, 231):
        assert style.group_colour(n) in style.SYSTEM_SHADES[style.group_system(n)]


def test_viridis_matches_matplotlib():
    # matplotlib's viridis colour map: the report's table of 17 anchors is matplotlib's colour there,
    # and linear interpolation between them stays within 6/255 of matplotlib's colour at 1001 points
    from matplotlib import colormaps
    from matplotlib.colors import to_hex
    cmap = colormaps["viridis"]
    assert list(style.VIRIDIS) == [to_hex(cmap(i / 16)) for i in range(17)]
    for t in np.linspace(0, 1, 1001):
        ours = style.viridis(t)
        rgb = [int(ours[k:k + 2], 16) for k in (1, 3, 5)]
        ref = [round(c * 255) for c in cmap(t)[:3]]
        assert max(abs(a - b) for a, b in zip(rgb, ref)) <= 6, (t, ours, ref)


# ----------------------------------------------------------------------------- colours are stable

def test_type_colours_are_the_same_in_every_plot_and_order(recs):
    # parsed SVG: every series keyed by a Bravais type is drawn in that type's fixed colour in the
    # deformation and distance plots of every run; a record whose types come in another order (and
    # with some missing) gets the same colours (a fixed table, not the order series appear)
    seen = {}
    for name, cname, c in _charts(recs):
        if cname not in ("deformation", "distance"):
            continue
        for m in _marks(svg.render(c)):
            key = m["data-key"]
            if key in style.TYPE_STYLE and m["data-kind"] == "line":
                assert m["data-colour"] == style.TYPE_STYLE[key]["colour"], (name, cname, key)
                seen.setdefault(key, set()).add(m["data-colour"])
    assert {"op", "oc", "tp", "hp", "mirror", "mP", "cF"} <= set(seen)
    assert all(len(v) == 1 for v in seen.values())
    rec = recs["L10"]
    shuffled = {**rec, "frames": [dict(f, deformation={"hp": f["deformation"]["hp"],
                                                       "op": f["deformation"]["op"]})
                                  for f in rec["frames"]]}
    got = {m["data-key"]: m["data-colour"] for m in _marks(svg.render(charts.deformation(shuffled)))
           if m["data-kind"] == "line"}
    assert got == {"hp": style.TYPE_STYLE["hp"]["colour"], "op": style.TYPE_STYLE["op"]["colour"]}


def test_group_colours_are_the_same_in_spectrum_and_displacement(recs):
    # parsed SVG: a group number has one colour in the spectrum (rectangles labelled with the number)
    # and in the displacement plot (series keyed by the number), in every run
    colours = {}
    for name in ("qe_bulk", "qe_fixed", "B07", "L09"):
        rec = recs[name]
        kind = "layer" if rec["geometry"]["dimension"] == 2 else "space"
        spec = svg.render(charts.spectrum(rec, (1e-3,)))
        for fill, text in re.findall(r'<rect [^>]*fill="(#[0-9a-f]{6})"[^>]*>(?:<title>[^<]*'
                                     r'</title>)?</rect><text [^>]*>(\d+)</text>', spec):
            colours.setdefault((kind, int(text)), set()).add(fill)
        for m in _marks(svg.render(charts.displacement(rec))):
            if m["data-key"].isdigit():
                colours.setdefault((kind, int(m["data-key"])), set()).add(m["data-colour"])
    assert len(colours) >= 8
    for (kind, n), cs in colours.items():
        assert cs == {style.group_colour(n, kind)}, (kind, n, cs)


# ------------------------------------------------------------------------- no series is hidden

def test_every_legend_entry_is_visible_in_the_svg(recs):
    # parsed SVG of every chart of seven real runs: no two series with identical points are drawn in
    # the same style; every legend entry has a drawn series of the same key and style; a series drawn
    # on the same points as an earlier one names it in its legend entry
    coincidences = 0
    for name, cname, c in _charts(recs):
        text = svg.render(c)
        marks = [m for m in _marks(text) if m["data-kind"] == "line" and m["points"]
                 and m["data-key"]]
        for j, b in enumerate(marks):
            same = [a for a in marks[:j] if a["points"] == b["points"]]
            for a in same:
                assert _style(a) != _style(b), (name, cname, a["data-key"], b["data-key"])
            if same and b.get("data-label") and cname in ("deformation", "distance", "cell"):
                coincidences += 1
                named = re.search(r"[=≈] (\S+?)[ )]", b["data-label"])
                # the series it names was drawn earlier within a pixel of it at every point
                near = [a for a in marks[:j] if _within_px(a, b, 1.0)]
                assert named and named.group(1) in {a["data-key"] for a in near}, \
                    (name, cname, b["data-label"])
        drawn = {(m["data-key"], _style(m)) for m in _marks(text)}
        for e in _entries(text):
            if e["data-key"]:
                assert (e["data-key"], _style(e)) in drawn, (name, cname, e)
    assert coincidences >= 3   # e.g. mirror = oc on L10, cubic lattices' types at 0


def test_layer_plot_names_the_series_that_coincide(recs):
    # L10 (a layer passing through a centred rectangular lattice): the nearest mirror lattice is the
    # oc one at every step (record values equal), and tp equals op (a square is reached through a
    # rectangle in this run's calibrated deformation); the legend says both
    rec = recs["L10"]
    assert all(f["deformation"]["mirror"] == f["deformation"]["oc"] for f in rec["frames"])
    assert all(f["deformation"]["tp"] == f["deformation"]["op"] for f in rec["frames"])
    labels = [m.label for m in charts.deformation(rec).panels[0].marks if m.label]
    assert "mirror (= oc at every step)" in labels and "tp (= op at every step)" in labels
    assert charts.coincident([1.0, 2.0], [1.0, 2.0]) == "="
    assert charts.coincident([1.0, 2.0], [1.001, 2.0]) == "≈"
    assert charts.coincident([1.0, 2.0], [1.05, 2.0]) is None
    assert charts.coincident([1.0, None], [1.0, 2.0]) is None


def test_a_series_under_another_at_most_steps_is_drawn_over_it_and_said():
    """A real buckled Si2 layer (pw.x, tests/data/qe_trials): tp equals op on 43 of its 47 frames
    (the record's values), not on all; tp is drawn hollow over op and its legend says where."""
    from pathlib import Path

    import driftwatch
    rec = driftwatch.analyze(Path(__file__).parent / "data" / "qe_trials" /
                             "si2_buckled_2dxy_passes_oc")
    same = sum(f["deformation"]["tp"] == f["deformation"]["op"] for f in rec["frames"])
    assert (same, len(rec["frames"])) == (43, 47)
    (tp,) = [m for m in charts.deformation(rec).panels[0].marks if m.key == "tp"]
    assert tp.label == "tp (≈ op at 43 of 47 steps)" and tp.hollow
    assert charts._close_points([1.0, 2.0, 3.0], [1.0, 2.5, 3.0]) == (2, 3)


def test_figures_follow_the_same_styles(recs):
    # matplotlib's artist API on the Figures driftwatch.plots returns: every Line2D keyed by a type
    # has that type's colour, marker and dash; two lines with identical data never share a style;
    # every legend handle matches a drawn line of the same style
    import matplotlib.colors as mc
    from matplotlib.figure import Figure
    from matplotlib.lines import Line2D

    import driftwatch.plots as dplots
    for name in ("L10", "qe_bulk"):
        figs = dplots.figures(recs[name])
        keys = {m.label for c in charts.run_charts(recs[name]).values() if c
                for p in c.panels for m in p.marks if m.kind == "key"}
        assert {"deformation", "distance", "cell", "energy"} <= set(figs)
        if recs[name]["geometry"]["dimension"] == 2:
            assert {"layer_map", "chirality"} <= set(figs)
        for fname, fig in figs.items():
            assert isinstance(fig, Figure)
            for ax in fig.axes:
                lines = [ln for ln in ax.get_lines() if ln.get_gid()]
                for ln in lines:
                    if ln.get_gid() in style.TYPE_STYLE and fname in ("deformation", "distance"):
                        st = style.TYPE_STYLE[ln.get_gid()]
                        assert mc.to_hex(ln.get_color()) == st["colour"]
                        assert ln.get_marker() == st["marker"]
                for a, b in itertools.combinations(lines, 2):
                    if np.array_equal(a.get_xydata(), b.get_xydata(), equal_nan=True):
                        sa = (mc.to_hex(a.get_color()), a.get_marker(), str(a.get_linestyle()),
                              str(a.get_markerfacecolor()))
                        sb = (mc.to_hex(b.get_color()), b.get_marker(), str(b.get_linestyle()),
                              str(b.get_markerfacecolor()))
                        assert sa != sb, (name, fname, a.get_gid(), b.get_gid())
                leg = ax.get_legend()
                if leg is None:
                    continue
                drawn = {(mc.to_hex(ln.get_color()), ln.get_marker()) for ln in ax.get_lines()}
                for h, t in zip(leg.legend_handles, leg.get_texts()):
                    # explicit keys ("solid: RMS", breakpoints) stand for a style, not for one line
                    if isinstance(h, Line2D) and t.get_text() not in keys:
                        assert (mc.to_hex(h.get_color()), h.get_marker()) in drawn, (name, fname)


# ------------------------------------------------------------------------------- what is plotted

def test_chirality_plot_holds_the_records_signed_chiral_distance(recs):
    # the record's per-frame chiral_distance is the black series, step by step; a flip is marked at
    # the step summary.verdict.lattice.handedness names
    rec = recs["L10"]
    c = charts.chirality(rec)
    line = next(m for m in c.panels[0].marks if m.kind == "line" and m.key.startswith("chiral"))
    assert line.y == [f["chiral_distance"] for f in rec["frames"]]
    assert line.x == [f["step"] for f in rec["frames"]]
    hand = rec["summary"]["verdict"]["lattice"]["handedness"]
    vline = next(m for m in c.panels[0].marks if m.kind == "vline")
    assert vline.x == [rec["frames"][hand["frame"]]["step"]]
    assert min(line.y) < 0 < max(line.y)
    assert charts.chirality(recs["qe_bulk"]) is None      # bulk: no 2D handedness


def test_step_axes_are_integer_and_one_frame_runs_get_one_tick(recs):
    # common practice: ionic steps are integers, so step ticks are whole numbers; a one-frame run has
    # one tick at its step; spectrum columns are one category each (0.8 wide), named by their step
    for name, cname, c in _charts(recs):
        for p in c.panels:
            if p.x.label.startswith("ionic step") and p.x.scale != "category":
                lo, hi = svg.limits(p.x, p.marks, "x")
                ticks, labels = svg.ticks_of(p.x, lo, hi, 500)
                assert all(float(t).is_integer() for t in ticks), (name, cname, ticks)
                assert all(re.fullmatch(r"−?\d+", lab) for lab in labels), labels
    rec = recs["L06"]
    one = {**rec, "frames": rec["frames"][:1]}
    for cname, c in charts.run_charts(one, (1e-3,)).items():
        if c is None or cname == "layer_map":
            continue
        for p in c.panels:
            lo, hi = svg.limits(p.x, p.marks, "x")
            ticks, _ = svg.ticks_of(p.x, lo, hi, 500)
            assert ticks == [0], (cname, ticks)
    spec = charts.spectrum(recs["qe_fixed"], (1e-3,))
    rects = spec.panels[0].marks[0]
    assert all(abs((b - a) - 0.8) < 1e-12 for a, b in zip(rects.x, rects.x1))
    steps = [str(f["step"]) for f in recs["qe_fixed"]["frames"] if f.get("symmetry")]
    assert spec.panels[0].x.ticklabels == steps


def test_energy_and_force_per_step(recs):
    # the energy panel is E - E(last step) from the record's frames; the force panel the record's fmax
    rec = recs["qe_layer"]
    c = charts.energy(rec)
    e = [m for m in c.panels[0].marks if m.kind == "line"][0]
    last = rec["frames"][-1]["energy"]
    assert e.y == pytest.approx([f["energy"] - last for f in rec["frames"]], abs=1e-12)
    fm = [m for m in c.panels[1].marks if m.kind == "line"][0]
    assert fm.y == [f["fmax"] for f in rec["frames"]]


# ------------------------------------------------------------------- cell parameters against ASE

def _lattice_vectors(cell, n=3):
    r = range(-n, n + 1)
    ints = np.array([v for v in itertools.product(r, repeat=len(cell)) if any(v)])
    return ints, ints @ np.asarray(cell)


@pytest.mark.parametrize("name", ["qe_bulk", "qe_fixed", "B07"])
def test_bulk_cell_parameters_describe_the_cell_ase_reads(recs, name):
    # ASE reads the same file; the volume equals |det| of ASE's cell, and the reduced cell derived
    # from the invariants is a basis of ASE's lattice: three integer combinations of ASE's cell
    # vectors have its lengths and mutual angles, with determinant ±1
    from ase.io import read
    path = RUNS[name] / "pw.out" if RUNS[name].is_dir() else RUNS[name]
    frames = read(path, index=":")
    cp = tables.cell_parameters(recs[name])
    assert len(frames) == len(cp["a"])
    for i in sorted({0, len(frames) // 2, len(frames) - 1}):
        cell = frames[i].cell[:]
        assert cp["volume"][i] == pytest.approx(abs(np.linalg.det(cell)), rel=1e-9)
        ints, vecs = _lattice_vectors(cell)
        norms = np.linalg.norm(vecs, axis=1)
        lengths = [cp[k][i] for k in ("a", "b", "c")]
        assert lengths == sorted(lengths)
        cands = [np.nonzero(np.abs(norms - L) < 1e-6)[0] for L in lengths]
        angles = sorted(cp[k][i] for k in ("alpha", "beta", "gamma"))
        ok = False
        for p, q, r in itertools.product(*cands):
            if abs(round(np.linalg.det(np.array([ints[p], ints[q], ints[r]])))) != 1:
                continue
            v = vecs[[p, q, r]]
            ang = sorted(math.degrees(math.acos(np.clip(v[x] @ v[y] / norms[[p, q, r]][x]
                                                        / norms[[p, q, r]][y], -1, 1)))
                         for x, y in ((1, 2), (0, 2), (0, 1)))
            if np.allclose(ang, angles, atol=1e-6):
                ok = True
                break
        assert ok, (name, i, lengths, angles)
        assert all(a >= 90 - 1e-9 for a in angles)   # Selling-reduced: every angle obtuse or right


@pytest.mark.parametrize("name", ["qe_layer", "L10", "L09"])
def test_layer_cell_parameters_are_the_two_shortest_vectors(recs, name):
    # ASE's cell of each frame: the in-plane lattice's two shortest independent vectors (enumerated)
    # have the lengths a <= b, their obtuse angle is gamma, and the area is ASE's face area
    from ase.io import read
    path = RUNS[name] / "pw.out" if RUNS[name].is_dir() else RUNS[name]
    frames = read(path, index=":")
    rec = recs[name]
    ax = rec["geometry"]["vacuum_axis"]
    cp = tables.cell_parameters(rec)
    for i in sorted({0, len(frames) // 2, len(frames) - 1}):
        cell = frames[i].cell
        plane = np.array([cell[k] for k in range(3) if k != ax])
        _, vecs = _lattice_vectors(plane, 4)
        norms = np.linalg.norm(vecs, axis=1)
        order = np.argsort(norms)
        v1 = vecs[order[0]]
        v2 = next(vecs[j] for j in order[1:] if np.linalg.norm(np.cross(v1, vecs[j])) > 1e-6)
        a, b = np.linalg.norm(v1), np.linalg.norm(v2)
        assert (cp["a"][i], cp["b"][i]) == pytest.approx((a, b), rel=1e-9)
        g = math.degrees(math.acos(abs(v1 @ v2) / (a * b)))
        assert cp["gamma"][i] == pytest.approx(180 - g, abs=1e-6)
        assert cp["area"][i] == pytest.approx(cell.area(ax), rel=1e-9)


# ------------------------------------------------------------------------------------ DataFrames

def test_tables_match_the_records_and_campaign_csv(tmp_path):
    # a real audit of the pw.x runs: the per-run DataFrame equals campaign.csv as pandas reads it (the
    # CSV prints 6 significant digits), and the per-frame DataFrame holds every frame's values
    import pandas as pd

    from driftwatch.campaign import audit
    out = tmp_path / "audit"
    audit([QE], out, workers=1, report=False, progress="off", quiet=True)
    runs = tables.runs_table(out)
    csv = pd.read_csv(out / "campaign.csv", keep_default_na=False)
    assert list(runs.columns) == list(csv.columns)
    assert sorted(runs["run"]) == sorted(csv["run"])
    runs, csv = runs.set_index("run").sort_index(), csv.set_index("run").sort_index()
    for col in ("drift_initial_A", "drift_final_A", "group_symprec_A", "recommended_symprec_A"):
        for a, b in zip(runs[col], csv[col]):
            if b == "":
                assert a is None or (isinstance(a, float) and math.isnan(a))
            else:
                assert a == pytest.approx(float(b), rel=1e-5)
    for col in ("verdict", "lattice_initial", "lattice_final", "drift_type", "group_initial",
                "group_final", "flags", "formula"):
        assert list(runs[col].fillna("")) == list(csv[col]), col
    frames = tables.frames_table(out / "records")      # named by run id, as in campaign.csv
    import json
    listed = json.loads((out / "campaign.json").read_text())["records"]
    assert sorted(set(frames["run"])) == sorted(listed)
    for rid, rel in listed.items():
        rec = driftwatch.records.read_json(out / rel)
        sub = frames[frames["run"] == rid]
        assert len(sub) == len(rec["frames"])
        for t, v in rec["frames"][-1]["deformation"].items():
            assert sub[f"deformation_{t}"].iloc[-1] == v
        assert sub["energy"].tolist() == [f["energy"] for f in rec["frames"]]


def test_end_points_runs_label_their_two_structures_not_ionic_steps():
    """ShakeNBreak's genuine vacancy folder (POSCAR and CONTCAR only): its two frames are the
    initial and final structures; every step axis says so."""
    from driftwatch.adapters import read_run
    from driftwatch.report import charts
    from driftwatch.track import analyze
    rec = analyze(read_run(Path(__file__).parent / "data" / "public" / "shakenbreak_vacancy" / "m30"))
    assert rec["run"]["kind"] == "end-points"
    for make in (charts.deformation, charts.distance, charts.cell, charts.spectrum):
        chart = make(rec)
        assert all(p.x.label == charts.END_POINTS_AXIS for p in chart.panels)


def test_a_saved_figure_keeps_the_legend_written_outside_its_axes():
    """The bundled B06 (an EMT Bain path): its deformation figure's legend, written below and
    beyond the axes, reaches past the figure's own width; ``savefig`` with no further argument
    writes the whole of it (matplotlib's tight bounding box), as a notebook shows it."""
    import io

    from PIL import Image

    from driftwatch import plots
    fig = plots.deformation(driftwatch.analyze(ROOT / "example_runs" / "B06_emt_bain.traj"))
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    FigureCanvasAgg(fig)
    renderer = fig.canvas.get_renderer()
    fig.draw(renderer)
    legend = fig.axes[0].get_legend().get_window_extent(renderer)
    assert legend.x1 > fig.bbox.width                         # it would be cut at the edge
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=fig.dpi)
    width = Image.open(io.BytesIO(buf.getvalue())).size[0]
    assert width >= legend.x1 - legend.x0 and width > fig.bbox.width
