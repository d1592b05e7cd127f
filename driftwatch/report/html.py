"""Static HTML report from run records: ``OUTPUT/index.html`` (the campaign) and ``OUTPUT/runs/<name>.html``.

Everything a page needs is inside the output folder: CSS inline, plots as inline SVG (drawn by
:mod:`driftwatch.report.svg` from the chart descriptions of :mod:`driftwatch.report.charts`, no
matplotlib), one small inline script (table sorting and filtering) allowed by a Content-Security-Policy
hash; pages load nothing from the network. Every string that came from an input file (titles, paths,
formulas, warnings, flag messages, code settings, group symbols) is escaped. Reports read records only,
never raw run files.

Pages are cached: each run page carries a key (sha256 of the record's bytes, its name and source, and
the source code of driftwatch), and ``OUTPUT/.pages.json`` keeps the key and the little the index needs
of each record, so a rebuild writes only the pages of records that changed.
"""

from __future__ import annotations

import base64
import hashlib
import html
import json
import math
import os
from pathlib import Path
from urllib.parse import quote

from .. import records as _records
from ..errors import OutputError
from .. import tasks as _tasks
from . import campaign as _camp
from . import charts, svg

__all__ = ["build", "FLAG_TEXT"]

FLAG_TEXT = {
    "lattice-gained": "the lattice ended on a Bravais type it started clearly away from (deformation "
                      "within 'within' at the end, at least 'start away' at the start)",
    "lattice-lost": "the lattice held a Bravais type at the start and ended clearly away from it",
    "lattice-changed": "the lattice left one type and reached another (a sideways change)",
    "lattice-nearing": "the lattice moved a large part of the way toward a type without reaching it",
    "passed-through": "the lattice held a type for part of the run and then left it again",
    "handedness-flip": "the layer's 2D lattice changed handedness (at the end, or on the way and "
                       "back again), so it passed through a lattice with a mirror line",
    "group-gained": "spglib's group of the final structure contains the starting one: the structure "
                    "gained symmetry operations",
    "group-lost": "spglib's group of the final structure is a subgroup of the starting one: the "
                  "structure lost symmetry operations",
    "group-changed": "spglib's groups at the start and the end do not contain one another",
    "atoms-break-lattice": "the lattice is metrically close to a type, but the atoms are not: the "
                           "structure's group has a lower lattice type",
    "symprec-dependent": "spglib's verdict on the final structure depends on which symprec in the "
                         "tested band you choose",
    "loose-symprec": "spglib at a loose symprec assigns a lattice type that, by the continuous "
                     "deformation, the lattice is still far from",
    "held-by-code": "the code's own symmetry handling (or ASE's FixSymmetry constraint) was on and "
                    "the run kept a symmetric group: it could not have lowered the operations it "
                    "held, so 'kept' is not a test of those",
}
"""Plain-language meaning of each flag code (codes are defined in :mod:`driftwatch.rules`)."""

DISCLAIMER = ("A flag is a diagnostic that asks you to look at a run; it is not a proof of stability, "
              "of instability or of a phase, and a run without flags is not shown to be stable. "
              "Distances, deformations and spglib verdicts depend on thresholds and tolerances, and a "
              "suggested symprec is a starting point, not a guarantee: check what matters to you with "
              "your own validation.")
"""The page's one notice (shown once, at the top of every page)."""

READ_ME = [
    "Distances are Euclidean distances in root-invariant space, in Å. They are square roots of "
    "conorms, so near rectangular lattices (a zero conorm) they grow like the square root of a "
    "deformation: a cell a hundredth of a degree from a right angle can be a few hundredths of an "
    "Å away.",
    "Deformation is in Å on spglib's symprec scale: how much the cell's vector lengths and angles "
    "(times a length) differ from their images under the type's symmetry operations (Lipschitz in "
    "the cell). It is comparable with spglib's symprec (within about a factor 2), and the flag "
    "thresholds "
    "use it. It is not how far a lattice vector must move (their ratio depends on the cell: "
    "about 0.9-3.8 on sheared rectangles), and far from a type (above ~0.3 Å) it only orders the "
    "types.",
    "The tolerance spectrum is spglib's verdict on a log grid of symprec (Å); a breakpoint is a "
    "bracket [low, high] Å in which the verdict changes. Verdicts that change inside the range you "
    "use are fragile.",
    "The displacement to a group is how far the atoms must move (RMS and max, Å) to be exactly "
    "symmetric under that group. In a fixed-cell run the lattice cannot drift; its symmetry drift is "
    "in the atoms, and this is where it shows.",
    "Series that coincide at every step are all drawn (later ones hollow and dashed over earlier "
    "ones) and the legend says so, e.g. 'mirror (= oc at every step)'. Colours, markers and dash "
    "patterns are fixed per Bravais type and per group number on every page: the hue says the "
    "crystal system, the marker the centring.",
]

_SCRIPT = """
(function () {
  function key(td) {
    var v = td.getAttribute('data-v');
    return v === null ? td.textContent.trim() : v;
  }
  document.querySelectorAll('table.sortable').forEach(function (t) {
    var heads = t.tHead.rows[0].cells;
    Array.prototype.forEach.call(heads, function (th, i) {
      th.tabIndex = 0;
      th.setAttribute('aria-sort', 'none');
      function go() {
        var asc = th.getAttribute('aria-sort') !== 'ascending';
        Array.prototype.forEach.call(heads, function (h) { h.setAttribute('aria-sort', 'none'); });
        th.setAttribute('aria-sort', asc ? 'ascending' : 'descending');
        var body = t.tBodies[0];
        var rows = Array.prototype.slice.call(body.rows);
        rows.sort(function (a, b) {
          var x = key(a.cells[i]), y = key(b.cells[i]);
          if (x === '' || y === '') { return (x === '') - (y === ''); }
          var nx = Number(x), ny = Number(y), c;
          c = (!isNaN(nx) && !isNaN(ny)) ? nx - ny : x.localeCompare(y);
          return asc ? c : -c;
        });
        rows.forEach(function (r) { body.appendChild(r); });
      }
      th.addEventListener('click', go);
      th.addEventListener('keydown', function (ev) {
        if (ev.key === 'Enter' || ev.key === ' ') { ev.preventDefault(); go(); }
      });
    });
  });
  var box = document.getElementById('filter');
  if (box) {
    box.addEventListener('input', function () {
      var q = box.value.toLowerCase();
      document.querySelectorAll('#runs tbody tr').forEach(function (r) {
        r.hidden = q !== '' && r.textContent.toLowerCase().indexOf(q) < 0;
      });
    });
  }
})();
"""
_SCRIPT_HASH = base64.b64encode(hashlib.sha256(_SCRIPT.encode()).digest()).decode()
_CSP = ("default-src 'none'; img-src data:; style-src 'unsafe-inline'; "
        f"script-src 'sha256-{_SCRIPT_HASH}'; base-uri 'none'; form-action 'none'")

_CSS = """
:root { --ink:#1d2430; --muted:#5b6575; --line:#d8dde5; --bg:#ffffff; --soft:#f5f7fa;
        --warn:#b35c00; --warnbg:#fff3e0; --info:#1d5fa5; --infobg:#e8f1fb; --ok:#1b7a4a; }
* { box-sizing: border-box; }
body { margin: 0; font: 15px/1.5 system-ui, -apple-system, "Segoe UI", Roboto, "DejaVu Sans", sans-serif;
       color: var(--ink); background: var(--bg); }
header.top { background: #1f2b3d; color: #fff; padding: 14px 28px; }
header.top a { color: #cfe1ff; }
header.top .crumb { font-size: 13px; opacity: .9; }
header.top h1 { margin: 4px 0 2px; font-size: 22px; font-weight: 600; overflow-wrap: anywhere; }
header.top .sub { font-size: 13px; color: #c9d3e0; overflow-wrap: anywhere; }
main { max-width: 1360px; margin: 0 auto; padding: 12px 28px 40px; }
h2 { font-size: 18px; margin: 28px 0 8px; padding-bottom: 4px; border-bottom: 1px solid var(--line); }
h3 { font-size: 15px; margin: 18px 0 6px; }
p, li { max-width: 80ch; }
.note { background: var(--warnbg); border-left: 4px solid var(--warn); padding: 8px 12px; margin: 12px 0;
        font-size: 14px; }
.fact { background: var(--infobg); border-left: 4px solid var(--info); padding: 8px 12px; margin: 12px 0;
        font-size: 14px; }
.muted { color: var(--muted); font-size: 13px; }
table { border-collapse: collapse; margin: 6px 0 10px; font-size: 13.5px; }
#runs { font-size: 13px; }
#runs td .badge { margin: 1px 0; }
#runs th, #runs td { padding: 4px 7px; }
#runs th { white-space: normal; vertical-align: bottom; }
td.nowrap { white-space: nowrap; }
td.err { max-width: 26em; overflow-wrap: anywhere; }
td.run { max-width: 22em; overflow-wrap: anywhere; }
th, td { border-bottom: 1px solid var(--line); padding: 4px 10px; text-align: left; vertical-align: top; }
th { background: var(--soft); font-weight: 600; white-space: nowrap; }
td.num { text-align: right; font-variant-numeric: tabular-nums; white-space: nowrap; }
table.kv th { width: 15em; background: none; color: var(--muted); font-weight: 500; white-space: normal; }
table.kv td { overflow-wrap: anywhere; }
table.sortable th { cursor: pointer; user-select: none; }
table.sortable th::after { content: " \\2195"; color: #9aa4b2; font-size: 11px; }
table.sortable th[aria-sort=ascending]::after { content: " \\2191"; color: var(--ink); }
table.sortable th[aria-sort=descending]::after { content: " \\2193"; color: var(--ink); }
.wide { overflow-x: auto; }
.badge { display: inline-block; padding: 0 7px; border-radius: 9px; font-size: 12px; font-weight: 600;
         white-space: nowrap; }
.warning { background: var(--warnbg); color: var(--warn); }
.info { background: var(--infobg); color: var(--info); }
.v-gained { background: #fde4d6; color: #9a3600; }
.v-lost { background: #f7e1ef; color: #8a2d6a; }
.v-changed { background: #fff0cc; color: #7a5200; }
.v-kept { background: #dff3e8; color: var(--ok); }
.c-lattice, .c-structure { background: var(--warnbg); color: var(--warn); }
.c-tolerance, .c-code { background: var(--infobg); color: var(--info); }
.v-unreadable, .v-failed { background: #eee; color: #555; }
figure { margin: 14px 0 22px; }
figure svg { max-width: 100%; height: auto; display: block; }
figcaption { font-size: 13px; color: var(--muted); max-width: 95ch; margin-top: 4px; }
.grid2 { display: grid; grid-template-columns: repeat(auto-fit, minmax(480px, 1fr)); gap: 8px 24px; }
.big { font-size: 20px; font-weight: 600; }
code, .mono { font-family: ui-monospace, "DejaVu Sans Mono", monospace; font-size: 12.5px;
              overflow-wrap: anywhere; }
input#filter { font: inherit; padding: 4px 8px; width: 22em; border: 1px solid var(--line);
               border-radius: 4px; }
footer { color: var(--muted); font-size: 12px; margin-top: 40px; border-top: 1px solid var(--line);
         padding-top: 8px; }
"""


_GENERATOR = '<meta name="generator" content="driftwatch report">'


def e(x) -> str:
    """HTML-escaped text of anything (None -> empty)."""
    return "" if x is None else html.escape(str(x), quote=True)


_fnum = charts.finite        # a finite float, or None



def _q(x, unit="Å", digits=3):
    """A quantity with its unit, escaped; '—' when missing."""
    x = _fnum(x)
    if x is None:
        return "—"
    return f"{x:.{digits}g}&nbsp;{e(unit)}" if unit else f"{x:.{digits}g}"


def _td_num(x, unit="", digits=3):
    v = _fnum(x)
    return (f'<td class="num" data-v="{"" if v is None else repr(v)}">'
            f'{_q(v, unit, digits) if v is not None else "—"}</td>')


def _type_name(t):
    from ..rules import NAMES
    if not t:
        return "—"
    return f"{e(t)} ({e(NAMES.get(t, 'unknown type'))})"


def _badge(text, cls):
    return f'<span class="badge {e(cls)}">{e(text)}</span>'


def _page(title, header, body, *, crumb="", script=False, key=""):
    return (
        "<!DOCTYPE html>\n<html lang=\"en\">\n<head>\n<meta charset=\"utf-8\">\n"
        f"{_GENERATOR}\n"
        + (f'<meta name="driftwatch-page" content="{e(key)}">\n' if key else "")
        + f'<meta http-equiv="Content-Security-Policy" content="{_CSP}">\n'
        '<meta name="viewport" content="width=device-width, initial-scale=1">\n'
        '<meta name="referrer" content="no-referrer">\n'

        f"<title>{e(title)}</title>\n<style>{_CSS}</style>\n</head>\n<body>\n"
        f'<header class="top">{crumb}{header}</header>\n<main>\n{body}\n'
        f"<footer>driftwatch static report, built from run records; no network access is needed to "
        f"view it.</footer>\n</main>\n"
        + (f"<script>{_SCRIPT}</script>\n" if script else "")
        + "</body>\n</html>\n")


def _figure(svg, caption):
    if not svg:
        return ""
    return f"<figure>{svg}<figcaption>{caption}</figcaption></figure>"


def _kv(rows):
    return ('<table class="kv">' + "".join(f"<tr><th>{k}</th><td>{v}</td></tr>" for k, v in rows)
            + "</table>")


# ------------------------------------------------------------------------------------------- inputs

def _is_campaign(data) -> bool:
    return isinstance(data, dict) and (str(data.get("schema", "")).startswith("driftwatch/campaign")
                                       or {"runs", "failed", "flag_counts"} <= set(data))


def _check_record(rec: dict):
    for key in ("run", "geometry", "frames", "summary"):
        if key not in rec:
            raise ValueError(f"record has no '{key}'")
    if not rec["frames"]:
        raise ValueError("record has no frames")


def _sources(items):
    """Record sources in input order: folders expand to their ``*.json`` files (sorted, not recursive;
    hidden files such as an audit's ``.driftwatch-audit.json`` marker are not records)."""
    out = []
    for item in items:
        if isinstance(item, dict):
            out.append(item)
            continue
        p = Path(item)
        out.extend(sorted(f for f in p.glob("*.json") if not f.name.startswith("."))
                   if p.is_dir() else [p])
    return out


def _origin(source, out) -> str | None:
    """Where a run page finds its record: the record's path relative to the page's folder
    (``out/runs``), so the link holds wherever the report was built from; None for a record
    given in memory."""
    if isinstance(source, dict):
        return None
    try:
        return Path(os.path.relpath(os.path.abspath(source),
                                    os.path.abspath(Path(out) / "runs"))).as_posix()
    except ValueError:                        # (another drive)
        return os.path.abspath(source)


def _process(source, name, label, out, key=""):
    """Read one source, write its page; -> ("ok", digest) | ("bad", problem) | ("campaign", dict).

    Runs in the building process or in a worker process; only a small digest of the record comes
    back, so a campaign of thousands of runs is never held in memory at once.
    """
    origin = _origin(source, out)
    try:
        rec = source if isinstance(source, dict) else _records.read_json(source)
        _check_record(rec)
    except (OSError, UnicodeDecodeError, ValueError) as exc:
        summary = None if isinstance(source, dict) else _maybe_campaign(source)
        if summary is not None:
            return "campaign", summary
        problem = str(exc)
        if isinstance(exc, FileNotFoundError):
            problem = "no such file"
        elif isinstance(exc, json.JSONDecodeError):
            problem = f"not JSON ({exc.msg}, line {exc.lineno})"   # msg may end "at"
        return "bad", problem.replace(f"{source}: ", "")
    try:
        text = run_page(name, label, rec, origin, key)
    except Exception as exc:  # a malformed record must not stop the report
        return "bad", f"page could not be built: {type(exc).__name__}: {exc}"
    _write_file(out, out / "runs" / f"{name}.html", text)
    return "ok", _digest(rec)


_SPEC_KEYS = ("symprec", "group", "group_symbol", "group_kind", "lattice", "breakpoints", "operations")


def _slim(frame):
    f = {k: frame[k] for k in ("index", "step", "energy", "fmax", "distance", "deformation")
         if k in frame}
    if frame.get("symmetry"):
        f["symmetry"] = {k: frame["symmetry"][k] for k in _SPEC_KEYS if k in frame["symmetry"]}
    return f


def _digest(rec):
    """What the index needs of a record: run, geometry, summary, flags, the first and last frames and
    the last spglib spectrum (slimmed), the report and symmetry config."""
    frames = rec["frames"]
    keep = [0, len(frames) - 1]
    spec = next((i for i in range(len(frames) - 1, -1, -1) if frames[i].get("symmetry")), None)
    if spec is not None:
        keep.append(spec)
    d = {k: rec.get(k) for k in ("schema", "run", "geometry", "summary", "flags")}
    d["frames"] = [_slim(frames[i]) for i in sorted(set(keep))]
    cfg = rec.get("config") or {}
    d["config"] = {k: cfg.get(k) or {} for k in ("report", "symmetry")}
    return d


# ------------------------------------------------------------------------------------------ caching

PAGES_FILE = ".pages.json"
"""In the report folder: ``{"code": ..., "pages": {name: {"key", "digest"}}}`` of the last build."""

_code_digest = []


def _code() -> str:
    """sha256 of driftwatch's own source files: a page built by other code is built again."""
    if not _code_digest:
        h = hashlib.sha256(_records.SCHEMA.encode())
        root = Path(__file__).resolve().parent.parent
        for f in sorted(root.rglob("*.py")):
            h.update(f.relative_to(root).as_posix().encode())
            h.update(f.read_bytes())
        _code_digest.append(h.hexdigest())
    return _code_digest[0]


def _key(source, name, label, out) -> str | None:
    """Cache key of a run page: the code, the page's name, label and origin (:func:`_origin`),
    the record's bytes."""
    try:
        raw = (_records.dumps(source).encode() if isinstance(source, dict)
               else Path(source).read_bytes())
    except (OSError, TypeError, ValueError):
        return None
    h = hashlib.sha256(_code().encode())
    for part in (name, label, _origin(source, out) or ""):
        h.update(b"\0" + str(part).encode("utf-8", "surrogateescape"))
    h.update(b"\0" + raw)
    return h.hexdigest()


def _load_pages(out: Path) -> dict:
    try:
        data = json.loads((out / PAGES_FILE).read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    if not isinstance(data, dict) or data.get("code") != _code():
        return {}
    pages = data.get("pages")
    return pages if isinstance(pages, dict) else {}


def _page_has_key(page: Path, key: str) -> bool:
    """The page was written for ``key`` by driftwatch and is whole (it ends with ``</html>``: a
    page cut or edited short is built again)."""
    try:
        with open(page, "rb") as fh:
            head = fh.read(700).decode("utf-8", errors="replace")
            fh.seek(max(0, os.fstat(fh.fileno()).st_size - 64))
            tail = fh.read()
    except OSError:
        return False
    return f'<meta name="driftwatch-page" content="{key}">' in head and _GENERATOR in head \
        and tail.rstrip().endswith(b"</html>")


def _maybe_campaign(path):
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except (OSError, UnicodeDecodeError, ValueError):
        return None
    return data if _is_campaign(data) else None


def _label(rec, path):
    if path is not None:
        return Path(path).stem
    r = rec.get("run") or {}
    src = r.get("run_dir") or r.get("source") or "run"
    parts = Path(str(src)).parts
    return "_".join(parts[-2:]) if len(parts) >= 2 else (parts[-1] if parts else "run")


class _Names:
    """Unique, file-safe page names (case-insensitively unique, for case-folding file systems)."""

    def __init__(self):
        self.used = set()

    def __call__(self, label):
        base = _records.safe_name(label)
        name, k = base, 2
        while name.lower() in self.used:
            name, k = f"{base}-{k}", k + 1
        self.used.add(name.lower())
        return name


# ------------------------------------------------------------------------------------------ run page

_cfg = charts.config_number         # a number from the record's config, or None


def _span(rec):
    """The symprec range (Å) the record's config mapped: (symprec_min, symprec_max)."""
    sym = (rec.get("config") or {}).get("symmetry") or {}
    lo, hi = _fnum(sym.get("symprec_min")), _fnum(sym.get("symprec_max"))
    return (lo, hi) if lo and hi and 0 < lo < hi else (1e-5, 0.3)


def _common(rec):
    return charts.common_symprecs(rec) or _camp.DEFAULT_COMMON


def _below_precision(low: float, high: float, floor) -> str:
    """The note of a symprec range (Å) that reaches below what the file's printed digits resolve."""
    if not floor or low >= floor:
        return ""
    if high <= floor:
        return "below the file's printed precision"
    return f"below {floor:.3g} Å, the file's printed precision"


def _min_plateau(rec) -> float:
    """The record's tolerance.min_plateau (factor): a stretch this wide is a plateau."""
    return float(((rec.get("config") or {}).get("tolerance") or {}).get("min_plateau", 10.0))


def _summary_section(rec):
    run, geo, s = rec["run"], rec["geometry"], rec["summary"]
    fin = s.get("final") or {}
    dim = geo.get("dimension")
    drift = s.get("drift")
    v = _records.verdict_fields(rec)
    verdict = v["verdict"]
    lat = s["verdict"]["lattice"]
    stages = _records.stages_text(rec)
    rows = [
        ("verdict", _badge(verdict, f"v-{verdict}") + f" <span class=\"muted\">"
                    f"{e(s['verdict']['text'])}</span>"),
        ("structure", f"{e(run.get('formula'))}, {e(run.get('n_atoms'))} "
                      f"atom{'s' if run.get('n_atoms') != 1 else ''}, "
                      + (e(_records.END_POINTS) if run.get("kind") == "end-points" else
                         (f"1 frame (step {e(_step_span(rec).split('-')[0])})"
                          if run.get("n_frames") == 1 else
                          f"{e(run.get('n_frames'))} frames (steps {e(_step_span(rec))})"))),
        *([("stages", e(stages))] if stages else []),
        *([("not a relaxation", f"{e(run['not_relaxation'])}<br><span class=\"muted\">the "
                                "verdict compares how the structure moved from the first frame "
                                "to the last, not where a relaxation ended</span>")]
          if run.get("not_relaxation") else []),
        *([("unfinished", f"{e(run['unfinished'])}<br><span class=\"muted\">the final structure "
                          "is not a relaxed one: the verdict compares the first frame with where "
                          "the run stopped</span>")] if run.get("unfinished") else []),
        ("kind", ("layer (2D lattice in the plane; vacuum along axis "
                  f"{e(geo.get('vacuum_axis'))})" if dim == 2 else "bulk (3D lattice)")
         + f"<br><span class=\"muted\">{e(geo.get('reason'))}</span>"),
        ("lattice", f"{_type_name(lat.get('initial'))} → {_type_name(lat.get('final'))} "
                    f"({e(lat.get('direction'))})"),
        ("spglib's group at the start / end",
         f"{e(v['group_initial'])} → {e(v['group_final'])} at symprec {_q(v['group_symprec'])} "
         f"({e(v['group_verdict'])})"),
    ]
    if drift:
        rows.append(("drift", f"deformation to {_type_name(drift.get('type'))}: "
                              f"{_q(drift.get('initial'))} → {_q(drift.get('final'))}"
                              f"{e(_records.peak_text(drift))}"))
    if fin.get("nearest"):
        rows.append(("nearest type not held at the end",
                     f"{_type_name(fin.get('nearest'))}: deformation {_q(fin.get('deformation'))}, "
                     f"root-space distance {_q(fin.get('distance'))}"))
    frames = rec.get("frames") or []
    e0 = _fnum(frames[0].get("energy")) if frames else None
    e1 = _fnum(frames[-1].get("energy")) if frames else None
    fmax = _fnum(frames[-1].get("fmax")) if frames else None
    if e0 is not None and e1 is not None:
        final_scf = _records.final_scf_text(rec)
        rows.append(("energy, first → last step", f"{e0:.6f} → {e1:.6f}&nbsp;eV "
                                                  f"(change {e1 - e0:+.4g}&nbsp;eV)"
                     + ("" if fmax is None else f"; final max force {_q(fmax, 'eV/Å')}")
                     + (f"<br><span class=\"muted\">{e(final_scf)}</span>" if final_scf else "")))
    if dim == 2:
        vs = geo.get("viewing_side")
        if vs:
            rows.append(("viewing side (sign is seen from)",
                         "(" + ", ".join(f"{float(x) + 0.0:.3g}" for x in vs) + ")"))
    rows.append(("source", f"<span class=\"mono\">{e(run.get('source'))}</span> "
                           f"(format {e(run.get('format'))})"))
    body = _kv(rows)
    if s.get("supercell"):
        text = s["supercell"]["text"]
        body += f'<p class="fact"><b>Supercell</b>: {e(text[:1].upper() + text[1:])}.</p>'
    if s.get("spglib_lattice"):
        text = s["spglib_lattice"]["text"]
        body += (f'<p class="fact"><b>Lattice near a threshold</b>: '
                 f'{e(text[:1].upper() + text[1:])}.</p>')
    if s.get("atoms"):
        body += (f'<p class="fact"><b>Atoms</b>: the displacement {e(_records.atoms_text(s["atoms"]))}'
                 "; the displacement plot draws the start on the same instance of the group.</p>")
    if rec.get("upgraded_from"):
        body += (f'<p class="fact"><b>Older record</b>: written as {e(rec["upgraded_from"])} and '
                 "judged again here from its own frames with this version's rules (its frames carry "
                 "no group relations, so the group level compares group numbers and operation "
                 "counts only).</p>")
    if len(rec.get("frames") or []) == 1:
        body += ('<p class="fact"><b>One frame</b>: one structure was read, so nothing can drift; '
                 "the verdict compares the structure with itself and the plots show that one "
                 "step.</p>")
    elif s.get("cell_held"):
        body += f'<p class="fact"><b>Cell held in part</b>: {e(s["cell_held"])}.</p>'
    elif run.get("fixed_cell"):
        free = _cell_free(run)
        note = s.get("lattice_note") or ("the lattice cannot drift; symmetry drift is in the atoms "
                                         "(see the displacement to each group)")
        note = note[len("fixed cell:"):].strip() if note.lower().startswith("fixed cell:") else note
        note = note[:1].upper() + note[1:]
        body += (f'<p class="fact"><b>{"Cell unchanged" if free else "Fixed cell"}</b>: every frame '
                 f"has the same cell. {e(note)}. The lattice plots are flat "
                 f"{'(the cell did not move)' if free else 'by construction'}; the tolerance spectrum "
                 "and the displacement plot (shown first below) carry the drift.</p>")
    return "<h2>Summary</h2>" + body


def _flags_section(rec):
    flags = rec.get("flags") or []
    if not flags:
        return ("<h2>Flags</h2><p>No flag was raised for this run at the configured thresholds; the "
                "plots below show how close it came.</p>")
    rows = "".join(
        f"<tr><td>{_badge(f.get('concerns'), 'c-' + str(f.get('concerns')))}</td>"
        f"<td><b>{e(f.get('code'))}</b></td>"
        f"<td class=\"num\">{e(f.get('step'))}</td><td>{e(f.get('type') or '')}</td>"
        f"<td>{e(f.get('message'))}<br><span class=\"muted\">{e(FLAG_TEXT.get(f.get('code'), ''))}"
        f"</span></td></tr>" for f in flags)
    what = ("'step' 1 is the final structure (an end-points run: no ionic steps between the two)"
            if (rec.get("run") or {}).get("kind") == "end-points" else
            "'step' is the first ionic step from which the flag holds")
    return (f"<h2>Flags</h2><p class=\"muted\">{what}.</p>"
            "<table><thead><tr><th>concerns</th><th>code</th><th>step</th><th>type</th><th>what was seen"
            f"</th></tr></thead><tbody>{rows}</tbody></table>")


def _tolerance_section(rec):
    tol = (rec.get("summary") or {}).get("tolerance") or {}
    spec = _camp.final_spectrum(rec)
    out = ["<h2>Tolerance advice</h2>"]
    recv = tol.get("recommended_symprec")
    if recv:
        ang = (spec or {}).get("angle_tolerance", -1.0)
        out.append(f'<p><span class="big">symprec ≈ {_q(recv)}</span> suggested for this run '
                   f"(spglib's verdict there, with angle_tolerance {ang:g}; a starting point for "
                   f"your own check; it does not establish the structure's group).")
    else:
        out.append("<p><span class=\"big\">no single symprec suggested</span>.")
    out.append(f"<br><span class=\"muted\">{e(tol.get('reason'))}.</span></p>")
    ranges = tol.get("ranges") or tol.get("stable_ranges") or []
    floor = _fnum(tol.get("resolution"))
    if ranges:
        from ..rules import shown_ranges

        def group(r):
            if r[5] == 1:
                return e(_records.group_name(r[3], r[2], r[4]))
            return (f"{e(r[3][0])} ({e(r[2][0])}) and {e(r[3][1])} ({e(r[2][1])}) alternate: "
                    f"{r[5]} stretches (spglib flickers)")
        rows = "".join(
            f"<tr>{_td_num(r[0], 'Å')}{_td_num(r[1], 'Å')}<td>{group(r)}</td>"
            f"<td class=\"num\">{_ratio(r[0], r[1])}</td>"
            f"<td>{_below_precision(r[0], r[1], floor)}</td></tr>"
            for r in shown_ranges([list(r) + [0] * (5 - len(r)) for r in ranges if len(r) >= 4],
                                  _min_plateau(rec)))
        out.append("<h3>Ranges of symprec with one spglib group (final structure)</h3><table><thead><tr>"
                   "<th>from</th><th>to</th><th>spglib's group</th><th>width (factor)</th><th></th>"
                   f"</tr></thead><tbody>{rows}</tbody></table>"
                   "<p class=\"muted\">Each range is spglib's verdict at the symprecs asked (the "
                   "grid, the brackets, the probes around a flicker): spglib can flicker in "
                   "windows of a few per cent that no probe met.</p>")
    if spec:
        common = _common(rec)
        cells = "".join(f"<th>{c:g} Å</th>" for c in common)
        ops = spec.get("operations") or []
        several = len({(n, k) for n, k in zip(spec["group"], ops)}) > len(set(spec["group"]))

        def at(c):                 # one group type with two operation counts: say the counts
            num, sym, k = _camp.verdict_at(spec, c)
            return e(_records.group_name(sym, num, k if several else None))
        g = "".join(f"<td>{at(c)}</td>" for c in common)
        lat = "".join(f"<td>{e(_camp.verdict_at(spec, c, 'lattice'))}</td>" for c in common) \
            if spec.get("lattice") else ""
        out.append("<h3>spglib's group at common choices of symprec</h3><table><thead><tr><th></th>"
                   f"{cells}</tr></thead><tbody><tr><th>structure group</th>{g}</tr>"
                   + (f"<tr><th>lattice alone</th>{lat}</tr>" if lat else "") + "</tbody></table>")
        ang = _fnum(spec.get("angle_tolerance"))
        out.append(f'<p class="muted">angle_tolerance = {"spglib default" if ang == -1 else _q(ang, "°")}'
                   f"; grid of {len(spec.get('symprec') or [])} symprec values from "
                   f"{_q(min(spec['symprec']))} to {_q(max(spec['symprec']))}.</p>")
    else:
        out.append("<p>No frame of this run was analysed with spglib, so there is no tolerance spectrum.</p>")
    return "".join(out)


def _ratio(a, b):
    a, b = _fnum(a), _fnum(b)
    if not a or not b or a <= 0:
        return "—"
    return f"{b / a:.3g}"


def _settings_section(rec):
    cs = (rec.get("run") or {}).get("code_settings") or {}
    if not cs:
        body = "<p>The code's own symmetry settings are not known for this run.</p>"
    else:
        body = ("<table><thead><tr><th>setting (record key, run.code_settings)</th><th>value</th>"
                "</tr></thead><tbody>"
                + "".join(f"<tr><td class=\"mono\">{e(k)}</td><td class=\"mono\">{e(_val(v))}</td></tr>"
                          for k, v in cs.items()) + "</tbody></table>")
    return ("<h2>Code-side symmetry settings</h2><p class=\"muted\">What the DFT code itself did with "
            "symmetry. With symmetry on, the code can keep the symmetry of the start; a relaxation that "
            "ends symmetric may then be held there rather than have found it.</p>" + body)


def _val(v):
    if isinstance(v, (dict, list, bool)) or v is None:    # as the record (JSON) spells it
        return json.dumps(v, ensure_ascii=False)
    return str(v)


def _warnings_section(rec):
    w = (rec.get("run") or {}).get("warnings") or []
    if not w:
        return "<h2>Warnings</h2><p>No warnings from reading this run.</p>"
    return "<h2>Warnings</h2><ul>" + "".join(f"<li>{e(x)}</li>" for x in w) + "</ul>"


_CAPTIONS = {
    "layer_map": "Path of the layer's 2D lattice on the projected-invariant map, one point per "
           "ionic step (colour: step), start circled, end starred. Horizontal axis: sign × x, "
           "vertical: y, with "
           "(x, y) = ((r02 − r01)/s, 3 r12/s), s = r12 + r01 + r02. The right half holds lattices of "
           "sign +1, the left half their mirror images (sign −1), both seen from the viewing side. "
           "Boundaries are where the sign is 0: the bottom edge is rectangular (op), the vertical "
           "centre line and both slanted edges are centred rectangular (oc), square (tp) sits at the "
           "bottom centre and hexagonal (hp) at the top. Bottom and slanted edges appear once per "
           "half; a path crossing them continues from the mirror point on the other half (dotted). "
           "Frames with sign 0 are drawn in the half of the step before them. Sign +1 means the "
           "obtuse-superbase vectors v1 → v2 (labelled by ascending conorms) turn counter-clockwise "
           "seen from the viewing side.",
    "chirality": "Handedness against ionic step: the record's chiral distance (sign × root-space "
                 "distance to the nearest lattice with a mirror line, Å; black) and sign × the "
                 "deformation to it (Å; what the handedness-flip rule compares with ±min chiral). "
                 "Zero is a mirror-symmetric lattice; a curve crossing it changed handedness.",
    "deformation": "Deformation (Å on spglib's symprec scale; what the flags "
                   "use) to each type against ionic step; dashed lines are the flag thresholds.",
    "distance": "Root-space distance (Å). Near rectangular lattices it grows like the square root of "
                "a deformation, so it is larger than the deformation there.",
    "cell": "Cell parameters per ionic step, derived from the record's invariants (the conorms of the "
            "obtuse superbase give the Gram matrix): the Selling-reduced cell, i.e. the shortest "
            "vectors of the obtuse superbase, a ≤ b (≤ c), every angle ≥ 90° (in 3D the three angles "
            "are sorted, not tied to a pair of vectors). Same lattice (same "
            "area or volume) as the run's cell, not its conventional cell: a hexagonal layer shows "
            "γ = 120°, a cubic F lattice a = b = c = a_conv/√2 with angles 90°, 120°, 120°.",
    "energy": "Energy relative to the last step (eV) and the largest force on an atom (eV/Å, log "
              "axis) per ionic step, as the file reports them.",
    "spectrum": "spglib's verdict (colour, with the group number or lattice symbol written in) at each "
                "symprec (log axis, Å) for the frames analysed with spglib, one column per frame. "
                "Black bars mark breakpoints (the verdict changes between two symprec values, shown "
                "at their geometric centre); dotted lines are common choices of symprec. Left: the "
                "whole structure (layer group for layers); right: the lattice alone.",
    "displacement": "How far the atoms must move (Å; solid RMS, dashed max) to be exactly symmetric "
                    "under each group spglib found at some symprec, on the frames analysed with "
                    "spglib. A curve on the bottom axis means the atoms already have that symmetry.",
}


class _Svg:
    """Renders the charts of one page with page-unique element ids."""

    def __init__(self):
        self.n = 0

    def __call__(self, chart):
        if chart is None:
            return ""
        self.n += 1
        return svg.render(chart, f"{chart.name}{self.n}")


def _plots_section(rec):
    frames = rec["frames"]
    dim = rec["geometry"].get("dimension")
    draw = _Svg()
    cs = charts.run_charts(rec, _common(rec))

    ends = rec["run"].get("kind") == "end-points"

    def fig(name):
        text = _CAPTIONS[name]
        if ends:                 # two structures, no ionic steps between them
            text = text.replace("per ionic step", "per structure (initial, final)").replace(
                "against ionic step", "against the structure (initial, final)")
        return _figure(draw(cs.get(name)), text)

    lattice = ["layer_map", "chirality", "deformation", "distance", "cell"] if dim == 2 else \
        ["deformation", "distance", "cell"]
    lattice = [fig(n) for n in lattice]
    if any(f.get("symmetry") for f in frames):
        atoms = [fig("spectrum"), fig("displacement")]
    else:
        atoms = ["<p>No frame was analysed with spglib: no tolerance spectrum or displacement "
                 "plot.</p>"]
    steps = [fig("energy") or "<p>The file holds no energies or forces.</p>"]
    if rec["run"].get("fixed_cell") and len(frames) > 1:
        flat = "in every frame" if _cell_free(rec["run"]) else "by construction"
        parts = (["<h3>Atoms (where a fixed-cell run drifts)</h3>"] + atoms + steps
                 + [f"<h3>Lattice (constant {flat})</h3>"] + lattice)
    else:
        parts = (["<h3>Lattice</h3>"] + lattice + ["<h3>Energy and forces</h3>"] + steps
                 + ["<h3>Atoms and spglib</h3>"] + atoms)
    return "<h2>Plots</h2>" + "".join(parts)


def _step_span(rec: dict) -> str:
    frames = rec.get("frames") or []
    return f"{frames[0]['step']}-{frames[-1]['step']}" if frames else "—"


def _cell_free(run: dict) -> str | None:
    from ..adapters.registry import cell_free
    return cell_free(run.get("code_settings") or {})


def _provenance_section(rec):
    v = rec.get("versions") or {}
    t = rec.get("timing") or {}
    rows = [("schema", e(rec.get("schema"))),
            ("versions", e(", ".join(f"{k} {_val(x)}" for k, x in v.items()))),
            ("metric", e(((rec.get("config") or {}).get("lattice") or {}).get("metric"))),
            ("time", e(", ".join(f"{k} {x:.3g}" if isinstance(x, float) else f"{k} {x}"
                                 for k, x in t.items()) or "—"))]
    return "<h2>Provenance</h2>" + _kv(rows)


def _how_to_read():
    return "<h2>How to read this</h2><ul>" + "".join(f"<li>{e(x)}</li>" for x in READ_ME) + "</ul>"


def run_page(name, label, rec, origin, key="") -> str:
    """HTML text of one run's page (linked from ``../index.html``); ``key`` marks the cache entry."""
    run = rec["run"]
    title = run.get("title")        # the file's own title line, below the run id every output uses
    header = (f"<h1>{e(label)}</h1><div class=\"sub\">"
              + (f"title {e(title)} · " if title and title != label else "")
              + (f'record <a href="{e(quote(origin))}">{e(origin)}</a>' if origin else "")
              + "</div>")
    warned = bool(run.get("warnings"))  # reading problems go up front, next to the summary
    body = (f'<p class="note">{e(DISCLAIMER)}</p>' + _summary_section(rec)
            + (_warnings_section(rec) if warned else "") + _flags_section(rec)
            + _tolerance_section(rec) + _plots_section(rec) + _settings_section(rec)
            + ("" if warned else _warnings_section(rec)) + _how_to_read() + _provenance_section(rec))
    crumb = '<div class="crumb"><a href="../index.html">← campaign index</a></div>'
    return _page(f"{label} · driftwatch", header, body, crumb=crumb, key=key)


# -------------------------------------------------------------------------------------------- index

def _index_page(runs, bad, failed, campaign) -> str:
    """HTML of the campaign index; ``runs`` is ``[(name, label, digest, origin)]`` of built pages."""
    draw = _Svg()
    skipped = [k for k in (campaign or {}).get("skipped") or [] if isinstance(k, dict)] \
        if isinstance(campaign, dict) else []
    recs = [(n, r) for n, _, r, _ in runs]
    common = _common(recs[0][1]) if recs else _camp.DEFAULT_COMMON
    tol = _camp.tolerance_table(recs, common)
    adv = (campaign or {}).get("tolerance") if isinstance(campaign, dict) else None
    if not isinstance(adv, dict):
        adv = _audit_advice(recs, common)
    counts = _camp.flag_counts([r for _, r in recs])
    from ..rules import FLAGS
    levels = {code: FLAGS.get(code, "") for code in counts}
    n_flagged = sum(1 for _, r in recs if r.get("flags"))
    n_moving = sum(1 for _, r in recs if _camp.is_not_relaxation(r))
    n_unfinished = sum(1 for _, r in recs if (r.get("run") or {}).get("unfinished"))
    verdicts = {}
    for _, r in recs:
        v = r["summary"]["verdict"]["direction"]
        verdicts[v] = verdicts.get(v, 0) + 1
    header = ("<h1>driftwatch campaign report</h1><div class=\"sub\">"
              f"{len(recs)} runs with a verdict · {n_flagged} with flags · {len(bad)} unreadable "
              f"input{'s' if len(bad) != 1 else ''} · "
              f"{len(failed)} failed run{'s' if len(failed) != 1 else ''}"
              + (f" · {len(skipped)} skipped" if skipped else "") + "</div>")
    parts = [f'<p class="note">{e(DISCLAIMER)}</p>']
    parts.append("<h2>Overview</h2>" + _kv([
        ("runs in this report", str(len(recs))),
        ("verdicts", ", ".join(f"{_badge(k, f'v-{k}')} {n}" for k, n in sorted(verdicts.items()))
         or "—"),
        ("runs with at least one flag", str(n_flagged)),
        ("unreadable inputs / failed runs", f"{len(bad)} / {len(failed)}"),
    ] + ([("not relaxations", f"{n_moving} <span class=\"muted\">(molecular dynamics, band "
                               "images, ...: their verdicts compare how the structure moved "
                               "from the first frame to the last)</span>")] if n_moving else [])
      + ([("unfinished", f"{n_unfinished} <span class=\"muted\">(cut short, damaged or "
                          "unreadable after a step, or stopped at their step or time limit, on "
                          "request, on a code error or without converging: their final "
                          "structures are not relaxed ones)</span>")]
         if n_unfinished else [])
      + ([("copies (runs that read the same frames)",
           "<br>".join(e(_copies_text(g)) for g in campaign["copies"][:10])
           + (" …" if len(campaign["copies"]) > 10 else "")
           + f'<br><span class="muted">{e(_copies_text(None))}; each copy counts as a run of its '
             f'own above</span>')]
         if isinstance(campaign, dict) and campaign.get("copies") else [])
      + ([("audit summary", e(_counts_text(campaign)))]
         if isinstance(campaign, dict) and "runs" in campaign else [])
      + ([("since the last audit", e(_since_text(campaign["since_last"])))]
         if isinstance(campaign, dict) and isinstance(campaign.get("since_last"), dict) else [])))
    parts.append(_campaign_tolerance(tol, adv, {n: lab for n, lab, _, _ in runs}))
    pts = charts.scatter_points((label, f"runs/{quote(name)}.html", r) for name, label, r, _ in runs)
    gb, lb = [], []
    for _, r in recs:
        spec = None if _camp.is_not_relaxation(r) else _camp.final_spectrum(r)
        if spec:
            gb += [math.sqrt(a * b) for a, b in _camp.group_breakpoints(spec, "group")]
            lb += [math.sqrt(a * b) for a, b in _camp.group_breakpoints(spec, "lattice")]
    parts.append("<h2>Across the campaign</h2>")
    parts.append(_figure(draw(charts.campaign_scatter(pts)),
                         f"Each run's deformation (left; Å on spglib's symprec scale, what the "
                         f"flags use) "
                         f"and root-space distance (right; Å) to the type its verdict is about (the "
                         f"drift columns of the table), at its first against its last step "
                         f"({len(pts)} runs with a verdict; circles layers, squares bulk). Every "
                         f"point links to its run's page and names it on hover"
                         + (" and beside it where names do not overlap" if len(pts) <= 30
                            else "") + ". On the dashed diagonal the lattice did not "
                         f"move: a fixed-cell run whose spglib group changed all the same (its "
                         f"atoms moved) lies there, drawn hollow in its verdict's colour; "
                         f"values at or below {charts.FLOOR:g} Å are drawn on "
                         f"the axes (runs that reached the type fall onto the bottom axis, runs that "
                         f"started at it onto the left one). Near rectangular lattices the root-space distance is the larger of "
                         f"the two (it grows like the square root of a deformation)."))
    parts.append('<div class="grid2">')
    parts.append(_figure(draw(charts.breakpoint_histogram(gb, lb, common,
                                                          _span(recs[0][1] if recs else {}))),
                         "Where spglib's verdict on each run's final structure changes, pooled over "
                         "the relaxations (log symprec, Å): the centre of each bracket for the "
                         "structure, of the grid interval for the lattice alone (never bracketed). "
                         "Dotted lines: common choices. A common choice sitting in a crowd of "
                         "breakpoints gives verdicts that flip with small changes."))
    if counts:
        parts.append(_figure(draw(charts.flag_bars(counts, levels)), "Runs carrying each flag."))
    parts.append("</div>")
    parts.append(_flag_table(counts, levels, campaign))
    parts.append(_runs_table(runs, failed, skipped))
    parts.append(_problems(bad, failed, skipped))
    parts.append(_how_to_read())
    return _page("driftwatch campaign report", header, "".join(parts), script=True)


def _since_text(since: dict) -> str:
    """The audit's line of what changed since the previous audit (``campaign.since_text``)."""
    from ..campaign import since_text
    return since_text(since)


def _copies_text(group: list[str] | None) -> str:
    """One group of copies in the audit's words (``campaign.copies_text``); None: what copies may
    be (``campaign.COPIES_WHY``)."""
    from ..campaign import COPIES_WHY, copies_text
    return COPIES_WHY if group is None else copies_text(group)


def _counts_text(campaign: dict) -> str:
    """The audit's own line of counts (``campaign.counts_text``); a summary of another layout
    gives its three numbers as they are."""
    from ..campaign import counts_text
    try:
        return counts_text(campaign)
    except (KeyError, TypeError):
        return ", ".join(f"{k} {campaign[k]}" for k in ("runs", "analysed", "cached")
                         if k in campaign)


def _audit_advice(recs, common):
    """The audit's own campaign advice (``rules.campaign_advice``) for these records, so that
    ``driftwatch report`` and ``driftwatch audit`` quote the same symprec."""
    from ..rules import advice_item, campaign_advice
    return campaign_advice([advice_item(name, r) for name, r in recs], list(common))


def _campaign_tolerance(tol, adv, labels=None):
    out = ["<h2>Tolerance advice for the campaign</h2>"]
    rec = _fnum(adv.get("recommended_symprec"))
    out.append(f'<p><span class="big">symprec ≈ {_q(rec)}</span> for this campaign'
               + (f" ({tol['n_with_spectrum']} of {tol['n_runs'] - tol['left_out']} relaxations have "
                  f"a tolerance spectrum; " + (f"{tol['left_out']} runs that are no relaxation are"
                                                if tol["left_out"] != 1 else
                                                "1 run that is no relaxation is") + " left out)."
                  if tol.get("left_out") else
                  f" ({tol['n_with_spectrum']} of {tol['n_runs']} runs have a tolerance spectrum).")
               + f"<br><span class=\"muted\">Reason: {e(adv.get('reason'))}.</span></p>")
    wide = [r for r in tol["stable_ranges"] if r[1] >= 1.5 * r[0]][:5]
    if wide:
        rows = "".join(f"<tr>{_td_num(a, 'Å')}{_td_num(b, 'Å')}<td class=\"num\">{_ratio(a, b)}</td></tr>"
                       for a, b in wide)
        out.append("<h3>Ranges of symprec where no run's spglib group changed at the symprecs "
                   "asked (widest first, factor ≥ 1.5)</h3><table>"
                   "<thead><tr><th>from</th><th>to</th><th>width (factor)</th></tr></thead>"
                   f"<tbody>{rows}</tbody></table><p class=\"muted\">spglib's verdict can change "
                   "in narrow windows between the symprecs asked (its grid, the brackets and the "
                   "flicker probes), inside a range: check the value you choose on your runs.</p>")
    elif tol["stable_ranges"]:
        a, b = max(tol["stable_ranges"], key=lambda r: r[1] / r[0])
        out.append(f"<p>No range of symprec of a factor ≥ 1.5 on the grid is free of every run's "
                   f"breakpoints: the widest is {a:g}-{b:g} Å (factor {_ratio(a, b)}).</p>")
    elif tol["n_with_spectrum"]:
        out.append("<p>No range of symprec on the grid is free of every run's breakpoints.</p>")
    if tol["changes"]:
        rows = []
        for c in tol["changes"]:
            names = ", ".join(f'<a href="runs/{quote(n)}.html">{e((labels or {}).get(n, n))}</a>'
                              for n in c["runs"][:8]) + (" …" if len(c["runs"]) > 8 else "")
            rows.append(f"<tr><td class=\"num\">{c['a']:g} Å</td><td class=\"num\">{c['b']:g} Å</td>"
                        f"<td class=\"num\">{len(c['runs'])}</td><td class=\"mono\">{names}</td></tr>")
        out.append("<h3>Runs whose spglib group changes between common choices of symprec</h3><table>"
                   "<thead><tr><th>symprec</th><th>against</th><th>runs that change</th><th>which</th>"
                   f"</tr></thead><tbody>{''.join(rows)}</tbody></table>"
                   "<p class=\"muted\">Verdict = spglib's space group (layer group for layers) of each "
                   "run's last analysed frame, at the grid value nearest to each symprec.</p>")
    return "".join(out)


def _flag_table(counts, levels, campaign):
    ext = (campaign or {}).get("flag_counts") if isinstance(campaign, dict) else None
    if not counts and not ext:
        return "<h2>Flags</h2><p>No flag was raised in any run at the configured thresholds.</p>"
    codes = list(counts) + [c for c in (ext or {}) if c not in counts]
    rows = "".join(
        f"<tr><td>{_badge(levels.get(c, ''), 'c-' + levels.get(c, ''))}</td><td><b>{e(c)}</b></td>"
        f"<td class=\"num\">{counts.get(c, 0)}</td>"
        + (f"<td class=\"num\">{e(_val(ext.get(c, 0)))}</td>" if ext else "")
        + f"<td>{e(FLAG_TEXT.get(c, ''))}</td></tr>" for c in codes)
    return ("<h2>Flags</h2><table><thead><tr><th>concerns</th><th>code</th><th>runs (this report)</th>"
            + ("<th>runs (audit summary)</th>" if ext else "")
            + f"<th>meaning</th></tr></thead><tbody>{rows}</tbody></table>")


def _runs_table(runs, failed=(), skipped=()):
    from .. import records
    from ..rules import FLAGS as concerns
    rows = []
    for f, kind in [(f, "failed") for f in failed] + [(k, "skipped") for k in skipped]:
        why = f.get("error") if kind == "failed" else f"{f.get('reason')} (to include: " \
                                                        f"{f.get('include')})"
        why = str(why or "")
        head, sep, rest = why.partition(": ")     # the table names the file, not its whole path
        short = f"{head.rsplit('/', 1)[-1]}: {rest}" if sep and "/" in head else why
        short = short if len(short) <= 120 else short[:117] + "…"
        rows.append((str(f.get("run") or ""),
                     f'<tr><td class="err"><span class="mono">{e(f.get("run"))}</span><br>'
                    f'<span class="muted" title="{e(why)}">{e(short)}</span></td><td>—</td>'
                    f"{_td_num(None)}"
                    f'<td data-v="{kind}">{_badge(kind, "v-failed")}</td>'
                    + "<td>—</td>" * 2 + _td_num(None) * 2 + "<td>—</td><td data-v=\"\">—</td>"
                    + _td_num(None) + "</tr>"))
    for name, label, rec, origin in runs:
        r, g = rec["run"], rec["geometry"]
        v = records.verdict_fields(rec)
        codes = sorted({f["code"] for f in rec.get("flags") or []})
        verdict = v["verdict"]
        kind = "layer" if g.get("dimension") == 2 else "bulk"
        grp = (e(v["group_initial"]) if v["group_initial"] == v["group_final"]
               else f"{e(v['group_initial'])} →<br>{e(v['group_final'])}")
        rows.append((str(label),
            f'<tr><td class="run"><a href="runs/{quote(name)}.html">{e(label)}</a>'
            f'<br><span class="muted">{e(r.get("title") or "")}</span>'
            + (f' <span class="badge warning">{len(r["warnings"])} warning'
               f'{"s" if len(r["warnings"]) > 1 else ""}</span>' if r.get("warnings") else "")
            + "</td>"
            f"<td>{e(r.get('formula'))}<br><span class=\"muted\">{kind}</span></td>"
            f"{_td_num(r.get('n_frames'))}"
            f'<td data-v="{e(verdict)}">{_badge(verdict, f"v-{verdict}")}'
            + (f'<br><span class="muted" title="{e(r["not_relaxation"])}">not a relaxation</span>'
               if r.get("not_relaxation") else "")
            + (f'<br><span class="muted" title="{e(r["unfinished"])}">unfinished</span>'
               if r.get("unfinished") else "")
            + ('<br><span class="muted" title="its reader gave one structure: the run\'s '
               'warnings say why">one frame: nothing compared</span>'
               if r.get("n_frames") == 1 else "") + "</td>"
            f"<td class=\"nowrap\" data-v=\"{e(v['lattice_initial'])} {e(v['lattice_final'])}\">"
            f"{e(v['lattice_initial'])} → <b>{e(v['lattice_final'])}</b></td>"
            f"<td>{e(v['drift_type'] or '')}</td>{_td_num(v['drift_initial'], 'Å')}"
            f"{_td_num(v['drift_final'], 'Å')}"
            f"<td class=\"nowrap\">{grp}</td>"
            f"<td data-v=\"{len(codes):03d} {e(' '.join(codes))}\">"
            f"{' '.join(_badge(c, 'c-' + concerns.get(c, '')) for c in codes) or '—'}</td>"
            f"{_td_num(v['recommended_symprec'], 'Å')}"
            "</tr>"))
    rows = [html_ for _, html_ in sorted(rows, key=lambda kv: kv[0].lower())]
    head = ("<tr><th>run</th><th>formula</th><th>frames</th><th>verdict</th><th>lattice</th>"
            "<th>drift type</th><th>drift from</th><th>drift to</th><th>group</th>"
            "<th>flags</th><th>recommended symprec</th></tr>")
    return ("<h2>Runs</h2><p class=\"muted\">Click a column head to sort. 'verdict' is which way the "
            "run's symmetry went (gained, lost, changed, kept) at the lattice and spglib-group levels; "
            "the drift columns are the deformation (Å, comparable with symprec) to the type the verdict "
            "is about, at the first and last step; 'group' is spglib's group at the verdict's symprec."
            "</p>"
            '<p><label>Filter: <input id="filter" type="search" placeholder="name, formula, flag …">'
            "</label></p>"
            f'<div class="wide"><table id="runs" class="sortable"><thead>{head}</thead><tbody>'
            f"{''.join(rows)}</tbody></table></div>")


def _problems(bad, failed, skipped=()):
    if not bad and not failed and not skipped:
        return ""
    out = ["<h2>Inputs that could not be used</h2>"]
    if bad:
        rows = "".join(f"<tr><td class=\"mono\">{e(p)}</td><td>{_badge('unreadable', 'v-unreadable')} "
                       f"{e(msg)}</td></tr>" for p, msg in bad)
        out.append("<h3>Unreadable inputs</h3><table><thead><tr><th>file</th><th>problem</th></tr>"
                   f"</thead><tbody>{rows}</tbody></table>")
    if failed:
        rows = "".join(f"<tr><td class=\"mono\">{e(f.get('run'))}</td><td class=\"mono\">"
                       f"{e(f.get('source'))}</td><td>{e(f.get('error'))}</td></tr>" for f in failed
                       if isinstance(f, dict))
        out.append("<h3>Runs the audit could not analyse</h3><table><thead><tr><th>run</th>"
                   f"<th>source</th><th>error</th></tr></thead><tbody>{rows}</tbody></table>")
    if skipped:
        rows = "".join(f"<tr><td class=\"mono\">{e(k.get('run'))}</td><td>{e(k.get('reason'))}</td>"
                       f"<td>{e(k.get('include'))}</td></tr>" for k in skipped)
        out.append("<h3>Runs skipped (neither a layer nor bulk)</h3><table><thead><tr><th>run</th>"
                   "<th>why</th><th>to include it</th></tr></thead>"
                   f"<tbody>{rows}</tbody></table>")
    return "".join(out)


# -------------------------------------------------------------------------------------------- build

def _write_file(root: Path, path: Path, text: str) -> Path:
    """Atomic write inside the report folder (``write_text_atomic`` applies the user's umask). No
    fsync: a page lost to a power cut has no key and is built again by the next build."""
    return _records.write_text_atomic(_inside(root, path), text, fsync=False)


def _prepare_output(output, overwrite):
    out = Path(output)
    if out.exists() and not out.is_dir():
        raise OutputError(f"{out}: exists and is not a folder")
    if out.is_dir() and any(out.iterdir()) and not overwrite:
        raise OutputError(f"{out}: folder exists and is not empty; use --overwrite "
                          f"(overwrite=True in Python) "
                          f"to replace the report in it")
    (out / "runs").mkdir(parents=True, exist_ok=True)
    return out


def _inside(root: Path, path: Path) -> Path:
    r, p = os.path.realpath(root), os.path.realpath(path)
    if os.path.commonpath([r, p]) != r:
        raise OutputError(f"{path}: outside the report folder {root}")
    return path


def build(records, output, *, overwrite=False, campaign=None, workers=None,
          progress="auto", unusable: list | None = None) -> Path:
    """Build the static HTML report; returns the path of ``OUTPUT/index.html``.

    Args:
        records: run-record JSON files and/or folders of them (``*.json``, not recursive); record dicts
            are accepted too. A file that is not a record is listed on the index as unreadable. An
            audit summary (``campaign.json``) among them, or beside a folder given (an audit's
            ``records/``), is used as ``campaign`` when none is given, and the records it lists are
            read too, so an audit's output folder is a valid input.
        output: report folder; created if needed. ``OUTPUT/runs/<name>.html`` holds one page per run.
            A page whose record, name and source (and driftwatch's code) did not change since the
            last build into this folder is kept as it is (``OUTPUT/.pages.json``).
        overwrite: allow writing into an existing non-empty folder (else :class:`OutputError`).
        campaign: optional audit summary dict (its ``failed`` and ``skipped`` runs, ``flag_counts``
            and ``tolerance`` advice are shown).
        workers: processes that build run pages (None: 1 for fewer than 32 pages to build, else up
            to 4; never more than one per 3 pages to build).
        progress: "auto" (on stderr when it is a terminal; ``$DRIFTWATCH_PROGRESS`` overrides), "on"
            or True, "off" or False.
        unusable: a list to receive ``(input, why)`` for every input that is not a usable record
            (they are listed on the index too).
    """
    if isinstance(records, (str, os.PathLike, dict)):
        records = [records]
    beside = []
    if campaign is None:     # an audit's records/ folder: its summary beside it names the runs
        found = (Path(os.path.abspath(r)).parent / "campaign.json" for r in records
                 if not isinstance(r, dict) and Path(r).is_dir())
        beside = [b for b in dict.fromkeys(found) if b.is_file()]
        records = beside + list(records)
    out = _prepare_output(output, overwrite)
    known = _load_pages(out)
    queue = _sources(records)
    names, seen = _Names(), set()
    runs, bad, found, cache = [], [], None, {}
    bar = _tasks.Progress(0, "driftwatch report", enabled=_tasks.progress_on(progress), unit="pages")
    reused_pages = 0

    def key(src):
        return id(src) if isinstance(src, dict) else os.path.realpath(src)

    ids = {}   # record file -> run id, from an audit summary (the names campaign.csv uses)

    def learn(summary, base):
        listed = summary.get("records") if isinstance(summary, dict) else None
        if isinstance(listed, dict) and base:
            for rid, rel in listed.items():
                ids[os.path.realpath(Path(base) / str(rel))] = str(rid)

    def label_of(src):
        if isinstance(src, dict):
            return _label(src, None)
        return ids.get(os.path.realpath(src), Path(src).stem)

    if isinstance(campaign, dict):
        learn(campaign, campaign.get("output"))
    for b in beside:         # the runs' names before any page is keyed (as the audit keys them)
        learn(_maybe_campaign(b), b.parent)

    def handle(src, name, page_key, result, reused=False):
        nonlocal found, reused_pages
        kind, value = result
        origin = None if isinstance(src, dict) else str(src)
        reused_pages += reused
        bar.update()
        if kind == "ok":
            runs.append((name, label_of(src), value, origin))
            if page_key:
                cache[name] = {"key": page_key, "digest": value}
        elif kind == "bad":
            bad.append((origin or "(record given in memory)", value))
        else:
            found = found or value
            learn(value, Path(src).parent)
            listed = value.get("records")
            more = [Path(src).parent / str(rel) for rel in
                    (listed.values() if isinstance(listed, dict) else [])]
            return [m for m in more if m.is_file()]
        return []

    def triage(items):
        """Pages that must be built; unchanged ones are handled at once."""
        todo = []
        items = [src for src in items if key(src) not in seen]
        bar.grow(len(items))
        for src in items:
            seen.add(key(src))
            name = names(label_of(src))
            page_key = _key(src, name, label_of(src), out)
            hit = known.get(name)
            if (page_key and isinstance(hit, dict) and hit.get("key") == page_key
                    and isinstance(hit.get("digest"), dict)
                    and _page_has_key(out / "runs" / f"{name}.html", page_key)):
                todo += triage(handle(src, name, page_key, ("ok", hit["digest"]), reused=True))
            else:
                todo.append((src, name, page_key))
        return todo

    def serial(pending):
        while pending:
            src, name, page_key = pending.pop(0)
            result = _process(src, name, label_of(src), out, page_key or "")
            pending += triage(handle(src, name, page_key, result))

    todo = triage(queue)
    n = len(todo)
    if workers is None:
        workers = 1 if n < 32 else min(4, os.cpu_count() or 1)
    workers = max(1, min(int(workers), n // 3))
    if workers <= 1:
        serial(todo)
    else:
        from concurrent.futures import FIRST_COMPLETED, ProcessPoolExecutor, wait
        from concurrent.futures.process import BrokenProcessPool
        futs = {}
        try:
            with ProcessPoolExecutor(workers, mp_context=_tasks.mp_context()) as pool:
                futs = {pool.submit(_process, src, name, label_of(src), out, k or ""): (src, name, k)
                        for src, name, k in todo}
                while futs:
                    done, _ = wait(futs, return_when=FIRST_COMPLETED)
                    for fut in done:
                        src, name, k = job = futs.pop(fut)
                        try:
                            result = fut.result()
                        except BrokenProcessPool:
                            futs[fut] = job
                            raise
                        for s2, n2, k2 in triage(handle(src, name, k, result)):
                            futs[pool.submit(_process, s2, n2, label_of(s2), out, k2 or "")] = \
                                (s2, n2, k2)
        except BrokenProcessPool:  # e.g. no importable __main__ for the workers: finish here
            serial(list(futs.values()))
    campaign = campaign if campaign is not None else found
    failed = [f for f in (campaign or {}).get("failed") or [] if isinstance(f, dict)]
    runs.sort(key=lambda r: r[0].lower())  # completion order varies with workers; pages do not
    bad.sort()
    if unusable is not None:
        unusable.extend(bad)
    index = out / "index.html"
    _write_file(out, index, _index_page(runs, bad, failed, campaign))
    _remove_stale(out, {f"{name}.html" for name, *_ in runs})
    _write_file(out, out / PAGES_FILE, json.dumps({"code": _code(), "pages": dict(sorted(
        cache.items()))}, separators=(",", ":"), ensure_ascii=False) + "\n")
    bar.close(f"{len(runs)} run pages ({reused_pages} unchanged, {len(runs) - reused_pages} "
              f"built) and the index: {index}")
    return index


def _remove_stale(out: Path, keep: set) -> None:
    """Delete run pages of an earlier build that this build did not write (only our own pages)."""
    for page in (out / "runs").glob("*.html"):
        if page.name in keep:
            continue
        try:
            with open(page, encoding="utf-8", errors="replace") as fh:
                head = fh.read(600)
            if _GENERATOR in head:
                page.unlink()
        except OSError:
            pass
