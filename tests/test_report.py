"""Tests of the static HTML report (driftwatch.report) on records of real pw.x relaxations.

Sources named beside each check:
* real pw.x output: tests/data/qe/* (Quantum ESPRESSO from Debian, run here), analysed with
  driftwatch.analyze -- the report is built from those records, never from invented data;
* spglib run directly on the final structure read by ASE's own espresso-out reader (external to the
  project) for the campaign's "runs that change verdict between common symprec choices";
* a real browser: headless Chromium (Debian package ``chromium``) loads the pages, runs their script
  and dumps the resulting DOM; an injected ``<script>``/``<img onerror>`` must stay text;
* the team's maths reference (projected invariant: vertices (0, 0) square, (0, 1) hexagonal; a path
  between opposite signs reflects in one edge) for the two-sided map;
* HTML structure checks (links resolve, no external URLs, everything inline): common practice.
"""

from __future__ import annotations

import copy
import html
import json
import shutil
import subprocess
import tempfile
from html.parser import HTMLParser
from pathlib import Path

import pytest

import driftwatch
from driftwatch import records
from driftwatch.errors import OutputError
from driftwatch.report import build, charts
from driftwatch.report import campaign as camp
from driftwatch.report.html import DISCLAIMER

QE = Path(__file__).parent / "data" / "qe"
RUNS = sorted(p.name for p in QE.iterdir() if (p / "pw.out").exists())
CHROMIUM = shutil.which("chromium")
needs_browser = pytest.mark.skipif(CHROMIUM is None, reason="headless chromium (Debian package "
                                   "'chromium') is not installed")
PWNED_TITLE = "<script>document.title='pwned'</script>"
PWNED_IMG = "<img src=x onerror=\"document.title='pwned-img'\">"


# ------------------------------------------------------------------------------------------ fixtures

@pytest.fixture(scope="module")
def real_records():
    """Records of the real pw.x runs in tests/data/qe (the report's input in production)."""
    assert RUNS, "no real pw.x runs in tests/data/qe"
    return {name: driftwatch.analyze(QE / name) for name in RUNS}


def _hostile(rec):
    """A copy of a real record whose input-derived strings carry HTML/JS and mathtext payloads."""
    r = copy.deepcopy(rec)
    r["run"]["title"] = f"Hostile {PWNED_TITLE} layer"
    r["run"]["source"] = f"/campaign/{PWNED_IMG}/pw.out"
    r["run"]["formula"] = "Si2<u>under</u>"
    r["run"]["warnings"] = [f"truncated {PWNED_IMG}"]
    r["run"]["code_settings"] = dict(r["run"]["code_settings"], **{"<i>key</i>": PWNED_TITLE})
    for f in r["flags"]:
        f["message"] = f["message"] + " " + PWNED_IMG
    for fr in r["frames"]:
        spec = fr.get("symmetry")
        if spec:  # an unbalanced mathtext string (matplotlib would raise if it parsed it) and markup
            spec["group_symbol"] = [s + r"$\frac{<i>g</i>" for s in spec["group_symbol"]]
    return r


@pytest.fixture(scope="module")
def report(real_records, tmp_path_factory):
    """One report from record files: the real runs, a hostile copy, a non-record and a broken record."""
    src = tmp_path_factory.mktemp("records")
    for name, rec in real_records.items():
        records.write_json(rec, src / f"{name}.json")
    layer = next(n for n, r in real_records.items() if r["geometry"]["dimension"] == 2)
    records.write_json(_hostile(real_records[layer]), src / "hostile.json")
    (src / "notes.json").write_text(json.dumps({"hello": "not a record"}))
    (src / "garbage.json").write_text("{ this is not json")
    broken = copy.deepcopy(real_records[layer])
    del broken["summary"]
    records.write_json(broken, src / "no_summary.json")
    out = tmp_path_factory.mktemp("report") / "site"
    index = build([src], out)
    return {"index": index, "out": out, "src": src, "names": sorted([*real_records, "hostile"])}


class _Tags(HTMLParser):
    def __init__(self):
        super().__init__()
        self.tags, self.text = [], []

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_startendtag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def _parse(text):
    p = _Tags()
    p.feed(text)
    return p


def _chromium(*args, timeout=90):
    with tempfile.TemporaryDirectory() as profile:
        cmd = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
               "--no-first-run", "--disable-background-networking", "--disable-component-update",
               "--disable-sync", f"--user-data-dir={profile}", *args]
        res = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    assert res.returncode == 0, res.stderr[-2000:]
    return res.stdout


# ----------------------------------------------------------------------------------------- structure

def test_pages_exist_and_links_resolve(report):
    # common practice: every local link of the index and of each run page points at a file that exists
    out = report["out"]
    assert report["index"] == out / "index.html" and report["index"].is_file()
    pages = sorted(p.stem for p in (out / "runs").glob("*.html"))
    assert pages == report["names"]
    for page in [report["index"], *(out / "runs").glob("*.html")]:
        tags = _parse(page.read_text(encoding="utf-8")).tags
        hrefs = [a["href"] for t, a in tags if t == "a" and "href" in a]
        assert hrefs, page
        for h in hrefs:
            target = (page.parent / h.split("#")[0]).resolve()
            assert target.is_file(), (page, h)
            if target.suffix == ".json" and page.parent.name == "runs":
                continue        # the run's record, relative to its page (checked below)
            assert out.resolve() in target.parents or target.parent == out.resolve()


def test_run_page_links_its_record_relative_to_the_page(real_records, tmp_path, monkeypatch):
    """The run page's header names its record by a path relative to the page, so it leads to the
    record wherever the report was built from (a new user's field trial: it was relative to the
    folder the audit ran in); `report --overwrite` of an audit's records from another folder then
    finds every page unchanged, as the audit keyed it (it rebuilt every page: the runs' names
    from the audit's summary were learnt after the pages were keyed)."""
    from driftwatch.campaign import audit
    out = tmp_path / "audit"
    monkeypatch.chdir(tmp_path)
    audit([QE], "audit", workers=1, progress="off", quiet=True)
    pages = sorted((out / "report" / "runs").glob("*.html"))
    assert pages
    for page in pages:
        got = _parse(page.read_text(encoding="utf-8")).tags
        href = [a["href"] for t, a in got if t == "a" and a.get("href", "").endswith(".json")]
        assert len(href) == 1 and href[0].startswith("../../records/")
        assert (page.parent / href[0]).resolve() == (out / "records" / f"{page.stem}.json")
    before = _stamps(out / "report")
    monkeypatch.chdir(out / "records")
    build(["."], "../report", overwrite=True, progress="off")
    assert _stamps(out / "report") == before


def test_everything_inline_and_no_external_urls(report):
    # common practice: a self-contained page loads nothing; plots are inline <svg>, styles inline
    for page in [report["index"], *(report["out"] / "runs").glob("*.html")]:
        text = page.read_text(encoding="utf-8")
        tags = _parse(text).tags
        for tag, attrs in tags:
            for key in ("src", "href", "xlink:href", "action", "poster", "data"):
                val = attrs.get(key) or ""
                assert not val.lower().startswith(("http:", "https:", "//", "ftp:")), (page, tag, val)
            if tag == "link":
                pytest.fail(f"{page}: external stylesheet/link element {attrs}")
            if tag == "script":
                assert "src" not in attrs
        assert "url(http" not in text and "@import" not in text
        assert "Content-Security-Policy" in text
    run_page = report["out"] / "runs" / f"{report['names'][0]}.html"
    n_svg = sum(1 for t, _ in _parse(run_page.read_text(encoding="utf-8")).tags if t == "svg")
    assert n_svg >= 3  # deformation, spectrum, displacement (+ map or systems)
    idx_svg = sum(1 for t, _ in _parse(report["index"].read_text(encoding="utf-8")).tags if t == "svg")
    assert idx_svg >= 2  # drift scatter and breakpoint distribution (+ flag counts)


def test_layer_page_has_map_and_bulk_page_has_13_types(report, real_records):
    # maths reference (projected invariant): square (0, 0) and hexagonal (0, 1) vertices, op/oc
    # edges labelled on the map; International Tables Pearson symbols of the 13 bulk types
    for name, rec in real_records.items():
        text = (report["out"] / "runs" / f"{name}.html").read_text(encoding="utf-8")
        if rec["geometry"]["dimension"] == 2:
            for label in ("tp square (0, 0)", "hp hexagonal (0, 1)", "op rectangular (y = 0)",
                          "oc centred rectangular", "sign −1"):
                assert label in text, label
        else:
            assert "deformation to each of the 13 Bravais types" in text
            for t in ("mP", "mS", "oP", "oS", "oI", "oF", "tP", "tI", "hR", "hP", "cP", "cI", "cF"):
                assert f'class="legend-entry" data-key="{t}"' in text, t   # one legend entry each
        assert text.count("not a proof") == 1 and "root-invariant space" in text
        if rec["run"]["fixed_cell"]:
            assert "<b>Fixed cell</b>: every frame has the same cell" in text


def test_unreadable_inputs_listed_not_fatal(report):
    # one bad input never stops the report: non-records and broken records are listed on the index
    text = report["index"].read_text(encoding="utf-8")
    section = text[text.index("Unreadable inputs"):]
    for name in ("notes.json", "garbage.json", "no_summary.json"):
        assert name in section, name
    assert "not a driftwatch run record" in section
    assert "record has no &#x27;summary&#x27;" in section


def test_audit_folder_with_summary(real_records, tmp_path):
    # an audit output folder (campaign.json listing records/...) is a valid input: the summary is
    # used as the campaign and the records it lists get their pages
    audit = tmp_path / "audit"
    (audit / "records").mkdir(parents=True)
    listed = {}
    for name, rec in real_records.items():
        records.write_json(rec, audit / "records" / f"{name}.json")
        listed[name] = f"records/{name}.json"
    summary = {"schema": "driftwatch/campaign-1", "runs": len(listed) + 1, "records": listed,
               "failed": [{"run": "lost", "source": "/c/lost", "error": "no frames"}],
               "flag_counts": {}}
    (audit / "campaign.json").write_text(json.dumps(summary))
    index = build([audit], tmp_path / "site")
    assert sorted(p.stem for p in (tmp_path / "site" / "runs").glob("*.html")) == sorted(listed)
    text = index.read_text(encoding="utf-8")
    assert "Runs the audit could not analyse" in text and "no frames" in text
    assert "Unreadable inputs" not in text


def test_records_folder_of_an_audit_reads_its_summary(real_records, tmp_path):
    """`driftwatch report AUDIT/records` (the --help example): the audit's campaign.json beside the
    folder names the runs by their run ids (not the record files' stems) and lists the failed run;
    each page is headed by its run id (the file's own title line below it)."""
    audit = tmp_path / "audit"
    (audit / "records").mkdir(parents=True)
    listed = {}
    for k, (name, rec) in enumerate(real_records.items()):
        records.write_json(rec, audit / "records" / f"r{k}.json")
        listed[f"camp/{name}"] = f"records/r{k}.json"
    summary = {"schema": "driftwatch/campaign-1", "runs": len(listed) + 1, "records": listed,
               "failed": [{"run": "camp/lost", "source": "/c/lost", "error": "no frames"}],
               "flag_counts": {}}
    (audit / "campaign.json").write_text(json.dumps(summary))
    index = build([audit / "records"], tmp_path / "site")
    text = index.read_text(encoding="utf-8")
    assert "1 failed run<" in text and "no frames" in text
    for rid in listed:
        assert f">{rid}<" in text
    page = next((tmp_path / "site" / "runs").glob("*.html")).read_text(encoding="utf-8")
    h1 = page[page.index("<h1>") + 4:page.index("</h1>")]
    assert h1 in listed


def test_malformed_record_page_listed_not_fatal(real_records, tmp_path):
    # a record that looks complete but breaks its page (a hand-edited spectrum with no verdicts) is
    # listed as unreadable; the other runs still get their pages
    good = next(iter(real_records.values()))
    bad = copy.deepcopy(good)
    bad["run"]["run_dir"] = "/campaign/broken_run"
    bad["frames"][-1]["symmetry"] = {"symprec": [1e-3, 1e-2], "group": [], "group_symbol": []}
    index = build([good, bad], tmp_path / "site")
    text = index.read_text(encoding="utf-8")
    assert "page could not be built" in text
    assert len(list((tmp_path / "site" / "runs").glob("*.html"))) == 1


def test_overwrite_protection(report, tmp_path, real_records):
    # nothing the user had is overwritten: a non-empty folder is refused unless overwrite=True
    out = tmp_path / "site"
    out.mkdir()
    keep = out / "mine.txt"
    keep.write_text("user data")
    rec = next(iter(real_records.values()))
    with pytest.raises(OutputError, match="not empty"):
        build([rec], out)
    assert not (out / "index.html").exists() and keep.read_text() == "user data"
    assert build([rec], out, overwrite=True) == out / "index.html"
    assert keep.read_text() == "user data"
    # a rebuild drops run pages of the earlier build that it no longer has; other files stay
    (old,) = (out / "runs").glob("*.html")
    mine = out / "runs" / "notes.html"
    mine.write_text("<p>user page</p>")
    other = copy.deepcopy(rec)
    other["run"]["run_dir"] = "/campaign/another_run"
    build([other], out, overwrite=True)
    assert not old.exists() and mine.exists() and keep.exists()
    assert [p.name for p in (out / "runs").glob("*.html") if p != mine] == ["campaign_another_run.html"]
    (tmp_path / "empty").mkdir()
    assert build([rec], tmp_path / "empty").is_file()  # an existing empty folder is fine
    f = tmp_path / "afile"
    f.write_text("x")
    with pytest.raises(OutputError):
        build([rec], f)


def test_page_names_stay_inside_output(tmp_path, real_records):
    # common practice: names from inputs never escape the output folder
    rec = copy.deepcopy(next(iter(real_records.values())))
    rec["run"]["run_dir"] = "../../../etc/passwd"
    rec2 = copy.deepcopy(rec)
    out = tmp_path / "site"
    build([rec, rec2], out)
    pages = sorted(p.name for p in (out / "runs").iterdir())
    assert len(pages) == 2 and all(".." not in p and "/" not in p for p in pages)
    assert sorted(p.name for p in out.iterdir()) == [".pages.json", "index.html", "runs"]
    assert not list(tmp_path.glob("*.html"))


def test_group_symbols_are_drawn_as_text(report):
    # the hostile record's group symbols end in an unbalanced "$\frac{<i>g</i>": the SVG legend
    # shows them literally (no mathtext, markup escaped), and no <i> element came from them
    text = (report["out"] / "runs" / "hostile.html").read_text(encoding="utf-8")
    svgs = [chunk.split("</svg>")[0] for chunk in text.split("<svg")[1:]]
    assert any("$\\frac{&lt;i&gt;g&lt;/i&gt;" in svg for svg in svgs)
    assert not [t for t, _ in _parse(text).tags if t == "i"]


def test_campaign_changes_match_spglib(real_records):
    # external check: spglib on ASE's reading of each bulk run's final structure decides whether the
    # run changes space group between two common symprec values; the report must count the same runs
    import spglib
    from ase.io import read

    pairs = [(1e-5, 1e-3), (1e-3, 1e-2), (1e-2, 0.1), (1e-5, 0.1)]
    table = camp.tolerance_table(list(real_records.items()), (1e-5, 1e-3, 1e-2, 0.1))
    got = {(c["a"], c["b"]): set(c["runs"]) for c in table["changes"]}
    checked = 0
    for name, rec in real_records.items():
        if rec["geometry"]["dimension"] != 3:
            continue  # the record holds layer groups for layers; spglib's space group differs
        atoms = read(QE / name / "pw.out", index=-1, format="espresso-out")
        cell = (atoms.cell[:], atoms.get_scaled_positions(), atoms.numbers)
        for a, b in pairs:
            ga = spglib.get_symmetry_dataset(cell, symprec=a).number
            gb = spglib.get_symmetry_dataset(cell, symprec=b).number
            assert (name in got[(a, b)]) == (ga != gb), (name, a, b, ga, gb)
            checked += 1
    assert checked >= 4
    # pooled stable ranges hold no run's breakpoint (the breakpoints are the records' own brackets)
    for lo, hi in table["stable_ranges"]:
        for bps in table["breakpoints"].values():
            assert all(b <= lo * (1 + 1e-12) or a >= hi * (1 - 1e-12) for a, b in bps)


def test_campaign_advice_agrees_with_audit(tmp_path):
    # a real audit of the pw.x runs (driftwatch.campaign.audit, which builds this report) and a
    # rebuild from its records quote the same campaign symprec as the audit's campaign.json; the
    # audit's consecutive-pair change counts equal the report's own table
    from driftwatch.campaign import audit
    out = tmp_path / "audit"
    summary = audit([QE], out, progress="off", quiet=True, use_cache=False)
    adv = summary["tolerance"]
    assert adv["recommended_symprec"] is not None
    expect = f"symprec ≈ {adv['recommended_symprec']:.3g}&nbsp;Å</span> for this campaign"
    assert expect in (out / "report" / "index.html").read_text(encoding="utf-8")
    rebuilt = build([out / "records"], tmp_path / "rebuilt")  # no summary: computed again
    assert expect in rebuilt.read_text(encoding="utf-8")
    recs = [(p.stem, records.read_json(p)) for p in sorted((out / "records").glob("*.json"))]
    table = camp.tolerance_table(recs, adv["symprecs"])
    mine = {(c["a"], c["b"]): len(c["runs"]) for c in table["changes"]}
    for c in adv["changes"]:
        assert mine[(c["low"], c["high"])] == c["runs"]


def test_campaign_summary_failed_runs_listed_escaped(real_records, tmp_path):
    # an audit summary's failed runs are listed on the index, their error text escaped
    summary = {"runs": 4, "failed": [{"run": "bad<run>", "source": "/x/<script>alert(1)</script>",
                                      "error": "pw.out: truncated <b>file</b>"}],
               "flag_counts": {"snapped": 7}}
    index = build(list(real_records.values()), tmp_path / "site", campaign=summary)
    text = index.read_text(encoding="utf-8")
    section = text[text.index("Runs the audit could not analyse"):]
    assert "bad&lt;run&gt;" in section and "&lt;script&gt;alert(1)&lt;/script&gt;" in section
    assert "truncated &lt;b&gt;file&lt;/b&gt;" in section
    assert "<script>alert" not in text
    assert "runs (audit summary)" in text
    # in the runs table, an error that starts with a long path names the file only (the whole
    # text stays in the row's title and in the section above)
    long = {"run": "deep", "source": "/a/" + "b" * 150, "error": "/a/" + "b" * 150 +
            "/vasprun.xml: no completed ionic step (the reason)"}
    text = build(list(real_records.values()), tmp_path / "site2",
                 campaign={"runs": 1, "failed": [long]}).read_text(encoding="utf-8")
    row = text[text.index('<span class="mono">deep</span>'):]
    row = row[:row.index("</tr>")]
    assert ">vasprun.xml: no completed ionic step (the reason)</span>" in row
    assert f'title="{long["error"]}"' in row


def test_flag_counts_match_records(report, real_records):
    # the index's counts per flag are the number of runs carrying each code (the hostile copy adds one)
    counts = camp.flag_counts(list(real_records.values()))
    assert counts == {c: sum(c in {f["code"] for f in r["flags"]} for r in real_records.values())
                      for c in counts}
    text = report["index"].read_text(encoding="utf-8")
    for code in counts:
        assert f"<b>{code}</b>" in text


def test_two_sided_map_convention():
    # maths reference: the shortest path between opposite signs reflects in one edge; only the x = 0
    # edge is continuous in the sign*x plane, crossings of y = 0 or x + y = 1 jump between the halves
    assert not charts._jump((0.02, 0.5), (0.03, 0.5))       # across x = 0 (nearest image (-x, y))
    assert charts._jump((0.4, 0.01), (0.4, 0.02))          # across y = 0
    assert charts._jump((0.45, 0.54), (0.46, 0.53))        # across x + y = 1
    # sign 0 frames (on a boundary) are drawn in the half of the step before them
    assert list(charts._effective_signs([0, 1, 0, -1, 0])) == [1, 1, 1, -1, -1]
    assert list(charts._effective_signs([0, 0, -1])) == [-1, -1, -1]


# ------------------------------------------------------------------------------------------- browser

@needs_browser
@pytest.mark.browser
def test_injected_markup_renders_as_text_in_chromium(report):
    # real browser: the hostile title/source/warnings/flag messages must be text, not elements
    page = report["out"] / "runs" / "hostile.html"
    dom = _chromium("--dump-dom", page.as_uri())
    p = _parse(dom)
    title = html.unescape(dom[dom.index("<title>") + 7:dom.index("</title>")])
    assert title == "hostile · driftwatch"      # the run id; the file's title is text below it
    assert not [a for t, a in p.tags if t == "img"], "an injected <img> became an element"
    assert not [a for t, a in p.tags if t == "script"], "an injected <script> became an element"
    assert not [a for t, a in p.tags if t in ("u", "i")], "injected markup became an element"
    text = "".join(p.text)
    assert PWNED_TITLE in text and PWNED_IMG in text and "Si2<u>under</u>" in text


@needs_browser
@pytest.mark.browser
def test_index_renders_and_script_runs_in_chromium(report):
    # real browser: the index's own script runs under its CSP hash (it marks the sortable headers),
    # the hostile run's title stays text in the table, and nothing injected became an element
    dom = _chromium("--dump-dom", report["index"].as_uri())
    p = _parse(dom)
    ths = [a for t, a in p.tags if t == "th" and "aria-sort" in a]
    assert len(ths) >= 10, "the sortable-table script did not run"
    assert [a for t, a in p.tags if t == "script"] == [{}]  # our one inline script, nothing else
    assert not [a for t, a in p.tags if t == "img"]
    title = html.unescape(dom[dom.index("<title>") + 7:dom.index("</title>")])
    assert title == "driftwatch campaign report"
    assert PWNED_TITLE in "".join(p.text)


@needs_browser
@pytest.mark.browser
def test_screenshots(report, tmp_path):
    # real browser: both pages render to a non-trivial image (the screenshots are also kept in /tmp
    # for a human look: driftwatch-report-index.png, driftwatch-report-run.png)
    layer = next(n for n in report["names"] if n != "hostile" and "layer" in n) \
        if any("layer" in n for n in report["names"]) else report["names"][0]
    for page, name in ((report["index"], "index"), (report["out"] / "runs" / f"{layer}.html", "run")):
        png = Path(tempfile.gettempdir()) / f"driftwatch-report-{name}.png"
        _chromium(f"--screenshot={png}", "--window-size=1280,2000", "--hide-scrollbars",
                  page.as_uri())
        data = png.read_bytes()
        assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 50_000, (png, len(data))


@needs_browser
@pytest.mark.browser
def test_table_sorts_numerically_in_chromium(report):
    # real browser: clicking the 'steps' head sorts the runs numerically (5 < 9 < 21, not as text),
    # a second click reverses. The click comes from a test-only copy of the index without its CSP.
    import re
    text = report["index"].read_text(encoding="utf-8")
    text = re.sub(r'<meta http-equiv="Content-Security-Policy"[^>]*>', "", text)
    probe = ("<script>var h = document.querySelectorAll('#runs thead th')[2];"
             "function order() { return Array.prototype.map.call(document.querySelectorAll("
             "'#runs tbody tr'), function (r) { return r.cells[2].getAttribute('data-v'); }).join(','); }"
             "h.click(); document.body.setAttribute('data-first', order());"
             "h.click(); document.body.setAttribute('data-second', order());</script>")
    page = report["index"].with_name("sort-probe.html")
    page.write_text(text.replace("</body>", probe + "</body>"), encoding="utf-8")
    try:
        dom = _chromium("--dump-dom", page.as_uri())
    finally:
        page.unlink()
    body = next(a for t, a in _parse(dom).tags if t == "body")
    first = [float(x) for x in body["data-first"].split(",")]
    second = [float(x) for x in body["data-second"].split(",")]
    assert len(first) == len(report["names"]) and len(set(first)) > 1
    assert first == sorted(first) and second == sorted(first, reverse=True)


def test_parallel_build_gives_the_same_pages(report, tmp_path, capsys):
    # pages built in worker processes are byte-identical to pages built in this process (the
    # progress line counts every page as built: none came from a cache)
    serial = report["out"]
    par = tmp_path / "par"
    build([report["src"]], par, workers=2, progress="on")
    assert f"{len(report['names'])} run pages (0 unchanged" in capsys.readouterr().err
    for page in [serial / "index.html", *sorted((serial / "runs").glob("*.html"))]:
        rel = page.relative_to(serial)
        a = page.read_text(encoding="utf-8").replace(str(report["src"]), "SRC")
        b = (par / rel).read_text(encoding="utf-8").replace(str(report["src"]), "SRC")
        assert a == b, rel


# ------------------------------------------------------------------------ notices, links, caching

def test_one_notice_per_page(report):
    # the disclaimer (flags are diagnostics, not proofs of stability) appears exactly once on every
    # page, index and run pages alike
    pages = [report["index"], *(report["out"] / "runs").glob("*.html")]
    assert len(pages) >= 4
    for page in pages:
        text = page.read_text(encoding="utf-8")
        assert text.count(html.escape(DISCLAIMER)) == 1, page
        assert text.count("not a proof") == 1, page


def test_campaign_scatter_points_name_and_link_their_run(report):
    # parsed SVG of the index: every scatter point sits in an <a> whose href is a run page that
    # exists, and carries a <title> naming that run
    import re
    text = report["index"].read_text(encoding="utf-8")
    chart = text[text.index('data-chart="campaign"'):]
    chart = chart[:chart.index("</svg>")]
    links = re.findall(r'<a href="([^"]+)"><path [^>]*><title>([^<:]+):', chart)
    assert links
    for href, name in links:
        assert (report["out"] / href).is_file(), href
        assert Path(href).stem == name.replace("/", "_")
    assert {Path(h).stem for h, _ in links} == {n for n in report["names"]
                                                if (report["out"] / "runs" / f"{n}.html").is_file()}


def test_campaign_scatter_draws_a_gain_by_the_atoms_hollow_on_the_diagonal():
    """example_runs' L09 (a fixed square cell: ASE reads the same cell in every frame) gained its
    group by its atoms and L06 changed its lattice: on the scatter L09 lies on the diagonal, where
    the caption once said "did not move"; it is drawn hollow under its own legend entry, L06 and
    a moving cell whose lattice verdict is 'kept' filled (a new user's field trial)."""
    from ase.io import read
    from driftwatch.report import charts
    from driftwatch.track import analyze
    runs = Path(__file__).parent.parent / "example_runs"
    cells = {a.cell.cellpar().round(9).tobytes() for a in read(runs / "L09_emt_fixed_square.traj",
                                                             ":")}
    assert len(cells) == 1
    recs = {n: analyze(runs / n) for n in ("L09_emt_fixed_square.traj", "L06_emt_bfgs.traj")}
    # a moving cell whose verdict comes from the group while the lattice's is 'kept' (inside the
    # margins): off the diagonal, filled (the regression review found it drawn hollow)
    ag = Path(__file__).parent / "data" / "user_trials" / "ag1_strain_bfgs.traj"
    recs["ag1"] = analyze(ag)
    assert recs["ag1"]["summary"]["verdict"]["lattice"]["direction"] == "kept"
    assert len({a.cell.cellpar().round(6).tobytes() for a in read(ag, ":")}) > 1   # ASE: moves
    assert recs["L09_emt_fixed_square.traj"]["summary"]["verdict"]["direction"] == "gained"
    pts = charts.scatter_points((n, f"runs/{n}.html", r) for n, r in recs.items())
    chart = charts.campaign_scatter(pts)
    marks = [m for m in chart.panels[0].marks if m.kind == "points" and m.label]
    by_name = {t.split(":")[0]: m for m in marks for t in m.tips}
    assert by_name["L09_emt_fixed_square.traj"].hollow
    assert by_name["L09_emt_fixed_square.traj"].label == "gained (layer, fixed cell)"
    assert not by_name["L06_emt_bfgs.traj"].hollow and not by_name["ag1"].hollow
    texts = [t for m in chart.panels[0].marks if m.kind == "text" for t in m.texts]
    assert "lattice did not move" in texts and "no change" not in texts


def _stamps(folder):
    return {p.name: (p.stat().st_mtime_ns, p.stat().st_ino) for p in (folder / "runs").glob("*.html")}


def test_unchanged_pages_are_not_rebuilt(real_records, tmp_path, capsys):
    # a second build from the same records rewrites no run page (same inode and mtime) but the index;
    # a changed record gets its page rebuilt; kept and rebuilt pages equal a cold build byte for byte.
    # Progress is printed on stderr when asked for (real output, captured).
    src = tmp_path / "records"
    for name, rec in real_records.items():
        records.write_json(rec, src / f"{name}.json")
    out = tmp_path / "site"
    build([src], out, progress="on")
    err = capsys.readouterr().err
    assert f"{len(real_records)} run pages (0 unchanged, {len(real_records)} built)" in err
    before = _stamps(out)
    build([src], out, overwrite=True, progress="on")
    assert f"({len(real_records)} unchanged, 0 built)" in capsys.readouterr().err
    assert _stamps(out) == before
    name = sorted(real_records)[0]
    changed = copy.deepcopy(real_records[name])
    changed["run"]["title"] = "retitled run"
    records.write_json(changed, src / f"{name}.json")
    build([src], out, overwrite=True, progress="off")
    after = _stamps(out)
    assert after[f"{name}.html"] != before[f"{name}.html"]
    assert {k: v for k, v in after.items() if k != f"{name}.html"} == \
        {k: v for k, v in before.items() if k != f"{name}.html"}
    assert "retitled run" in (out / "runs" / f"{name}.html").read_text(encoding="utf-8")
    cold = tmp_path / "cold"
    build([src], cold, progress="off")
    for page in sorted((cold / "runs").glob("*.html")) + [cold / "index.html"]:
        assert page.read_bytes() == (out / page.relative_to(cold)).read_bytes(), page.name
    assert not capsys.readouterr().err          # progress="off": nothing printed
    # a page cut short (a disk filled, a user's editor) is built again although its record is not
    # changed: the whole page equals a cold build's again
    page = out / "runs" / f"{name}.html"
    page.write_bytes(page.read_bytes()[:500])
    build([src], out, overwrite=True, progress="on")
    assert f"({len(real_records) - 1} unchanged, 1 built)" in capsys.readouterr().err
    assert page.read_bytes() == (cold / "runs" / f"{name}.html").read_bytes()


def test_warm_audit_keeps_every_run_page(tmp_path):
    # a real audit twice on the same pw.x runs: the second (everything cached) rewrites no run page
    from driftwatch.campaign import audit
    out = tmp_path / "audit"
    audit([QE], out, workers=1, progress="off", quiet=True)
    before = _stamps(out / "report")
    s = audit([QE], out, workers=1, progress="off", quiet=True)
    assert s["cached"] == s["runs"] and _stamps(out / "report") == before and before


@needs_browser
@pytest.mark.browser
def test_scatter_links_are_links_in_chromium(report):
    # real browser: the index's DOM holds the scatter's SVG <a> elements, pointing at run pages
    dom = _chromium("--dump-dom", report["index"].as_uri())
    hrefs = [a.get("href") for t, a in _parse(dom).tags if t == "a" and
             str(a.get("href", "")).startswith("runs/")]
    assert len(hrefs) >= 2 * len(RUNS)          # table rows and scatter points (both panels)


def test_point_lists_and_markers_are_written_as_one_decimal_each():
    # the SVG writer formats a point list and a marker's path in one format call each: the same
    # text as formatting every coordinate on its own (one decimal: a tenth of a pixel)
    import numpy as np
    from driftwatch.report import svg
    rng = np.random.default_rng(3)
    pts = [(float(a), float(b)) for a, b in rng.normal(0, 300, (200, 2))]
    pts += [(0.05, -0.05), (-0.04, 1e-9), (2.25, 2.35), (1e6, -1e6)]
    assert svg._points(pts) == " ".join(f"{svg._f(a)},{svg._f(b)}" for a, b in pts)
    assert svg._points([]) == ""
    x, y, s = 12.34, 56.78, 7.0
    r = s / 2
    assert svg.marker_path("o", x, y, s) == (
        f"M{svg._f(x - r)},{svg._f(y)}a{svg._f(r)},{svg._f(r)} 0 1,0 {svg._f(2 * r)},0"
        f"a{svg._f(r)},{svg._f(r)} 0 1,0 {svg._f(-2 * r)},0Z")
    q = r * 0.9
    assert svg.marker_path("s", x, y, s) == "M" + "L".join(
        f"{svg._f(x + a)},{svg._f(y + b)}" for a, b in [(-q, -q), (q, -q), (q, q), (-q, q)]) + "Z"


def test_runs_at_one_point_of_the_campaign_scatter_are_all_named_and_drawn(tmp_path):
    """The bundled campaign's B02 (kept, bulk) and L09 (gained, layer) both end and start on the
    type of their verdict (deformation <= 1e-6 Å at both steps, from their records): the point
    names both, and the one drawn under the other shows as a ring (it had been hidden, and its
    label dropped)."""
    from driftwatch.report import charts
    demo = Path(__file__).parent.parent / "example_runs"
    recs = {n: driftwatch.analyze(demo / n) for n in ("B02_qe_vcrelax_sym",
                                                      "L09_emt_fixed_square.traj")}
    pts = []
    for n, r in recs.items():
        d = r["summary"]["drift"]
        assert d["initial"] <= 1e-6 and d["final"] <= 1e-6
        pts.append({"name": n, "href": n, "verdict": r["summary"]["verdict"]["direction"],
                    "dim": r["geometry"]["dimension"], "type": d["type"], "def0": d["initial"],
                    "def1": d["final"], "dist0": d["initial"], "dist1": d["final"]})
    chart = charts.campaign_scatter(pts)
    marks = chart.panels[0].marks
    named = [t for m in marks if m.kind == "points" and m.texts for t in m.texts if t]
    assert named == ["L09_emt_fixed_square.traj = B02_qe_vcrelax_sym"] or \
        named == ["B02_qe_vcrelax_sym = L09_emt_fixed_square.traj"]
    rings = [m for m in marks if m.kind == "points" and m.hollow]
    assert len(rings) == 1 and rings[0].size > 7.5


def test_campaign_histogram_places_the_lattice_changes_read_off_the_grid(real_records):
    """Records bracket the lattice alone nowhere (docs/record.md); its changes on the final
    spectrum's grid are what the histogram's lattice series shows (real pw.x runs of tests/data/qe;
    the grid values are spglib's lattice verdicts)."""
    from driftwatch.report import campaign as camp
    seen = 0
    for rec in real_records.values():
        spec = camp.final_spectrum(rec)
        if not spec:
            continue
        assert not [b for b in spec["breakpoints"] if b["kind"] == "lattice"]
        lat, grid = spec["lattice"], spec["symprec"]
        want = [(grid[i], grid[i + 1]) for i in range(len(lat) - 1) if lat[i] != lat[i + 1]]
        assert camp.group_breakpoints(spec, "lattice") == want
        seen += len(want)
    assert seen > 0


def test_a_campaign_with_no_wide_common_range_says_so(real_records):
    """The index's table of symprec ranges no run's group changes in lists those of a factor 1.5
    or more; when every range of the campaign is narrower (thousands of runs: one always changes),
    it had shown an empty table under its heading. It says so, and names the widest range."""
    from driftwatch.report import html
    table = camp.tolerance_table(list(real_records.items()), (1e-5, 1e-3, 1e-2, 0.1))
    narrow = dict(table, stable_ranges=[[1.0e-4, 1.2e-4], [2.0e-3, 2.8e-3]])
    text = html._campaign_tolerance(narrow, {"recommended_symprec": None, "reason": "none"})
    assert "<tbody></tbody>" not in text
    assert ("No range of symprec of a factor ≥ 1.5 on the grid is free of every run's breakpoints: "
            "the widest is 0.002-0.0028 Å (factor 1.4).") in text
    one = html._campaign_tolerance(dict(table, left_out=1), {"recommended_symprec": None,
                                                             "reason": "none"})
    assert "1 run that is no relaxation is left out)." in one       # (it said "1 runs ... are")


def test_many_runs_at_one_point_of_the_campaign_scatter_are_counted_not_ringed():
    """A campaign of many fixed-cell runs that end on their type (the bundled B02 and L09, whose
    deformations are <= 1e-6 Å at both steps, 150 copies each under other names): a ring for each
    run under another had reached thousands of pixels; at most charts.RINGS rings are drawn, and
    the point says how many runs it holds."""
    from driftwatch.report import charts
    demo = Path(__file__).parent.parent / "example_runs"
    pts = []
    for n in ("B02_qe_vcrelax_sym", "L09_emt_fixed_square.traj"):
        r = driftwatch.analyze(demo / n)
        d = r["summary"]["drift"]
        pts += [{"name": f"{n}-{k:03d}", "href": n, "verdict": r["summary"]["verdict"]["direction"],
                 "dim": r["geometry"]["dimension"], "type": d["type"], "def0": d["initial"],
                 "def1": d["final"], "dist0": d["initial"], "dist1": d["final"]}
                for k in range(150)]
    for panel in charts.campaign_scatter(pts).panels:
        rings = [m for m in panel.marks if m.kind == "points" and m.hollow]
        assert len(rings) == charts.RINGS and max(m.size for m in rings) <= 7.5 + 4.0 * charts.RINGS
        counts = [t for m in panel.marks if m.kind == "text" for t in m.texts if t.startswith("×")]
        assert counts == ["×300"]
        drawn = sum(len(m.x) for m in panel.marks if m.kind == "points" and not m.hollow)
        assert drawn == 300                                  # every run is still a linked point


def test_a_point_label_goes_where_it_covers_no_other_point():
    """A label beside a point had been placed at the first place free of other labels, over a
    neighbour's marker if one lay there (the bundled campaign's scatter: L06's name was written
    across L10's marker). Two points 20 px apart on one row: the left one's name, too long for the
    gap, goes to its left; the right one's to its right (geometry of the drawn SVG)."""
    import re
    from driftwatch.report import svg
    from driftwatch.report.charts import Axis, Chart, Mark, Panel
    names = ["a-rather-long-run-name", "its-neighbour"]
    pts = Mark("points", [5.0, 5.5], [5.0, 5.0], marker="o", size=7.5, texts=names)
    out = svg.render(Chart("t", [Panel(Axis("x", lim=(0, 10)), Axis("y", lim=(0, 10)), [pts],
                                       legend=None)], width=400, height=300))
    marks = [(float(x) + float(r), float(y)) for x, y, r in
             re.findall(r'<path d="M([\d.]+),([\d.]+)a([\d.]+),', out)]
    assert len(marks) == 2 and 15 < marks[1][0] - marks[0][0] < 25
    labels = dict((t, (float(x), anchor)) for x, anchor, t in re.findall(
        r'<text x="([\d.]+)" y="[\d.]+" font-size="9" fill="#333" text-anchor="(\w+)">([^<]+)<',
        out))
    assert labels[names[0]][1] == "end" and labels[names[0]][0] < marks[0][0]
    assert labels[names[1]][1] == "start" and labels[names[1]][0] > marks[1][0]


def test_the_advice_says_what_it_is_on_the_run_page_and_the_index(report):
    """A field trial handed each run's suggested symprec to pymatgen (angle_tolerance 5 degrees by
    default) and checked the index's ranges with spglib at points inside them: the run page now
    says which angle_tolerance its verdict is spglib's at and that it is no proof of the group; the
    index's ranges are those where no group changed at the symprecs asked (a comb of P2_1/c windows
    sat inside one, on a real CHGNet relaxation), and say that windows between them are not seen."""
    pages = [p.read_text(encoding="utf-8") for p in (report["out"] / "runs").glob("*.html")]
    said = [t for t in pages if "suggested for this run" in t]
    assert said and all("(spglib's verdict there, with angle_tolerance -1; a starting point for "
                        "your own check; it does not establish the structure's group)." in t
                        for t in said)
    index = report["index"].read_text(encoding="utf-8")
    assert "where no run's spglib group changed at the symprecs asked" in index
    assert "spglib's verdict can change in narrow windows between the symprecs asked" in index
