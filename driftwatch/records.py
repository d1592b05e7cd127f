"""The run record (JSON, schema ``driftwatch/run-2``), its CSV row and its ase.db row.

The record is documented field by field in ``docs/record.md``. Writers are atomic: a temporary file in
the destination folder, flushed and fsynced, then renamed over the target, so a killed process leaves
either the old file or the new one, never a torn one. The rename replaces a symbolic link planted at
the target; it never writes through it. Temporary files are named ``.driftwatch-XXXXXXXX.tmp``
(:data:`TEMP_PREFIX`; short, so any target name fits NAME_MAX), and only those are ever cleaned up.

Names from the file system may hold bytes that are not UTF-8 (kept by Python as surrogate escapes)
and control characters (terminal escapes, tabs, line breaks). :func:`shown` is the one spelling of
such a name in every text output (terminal, CSV, report, ase.db): ``\\xNN`` for each such byte or
control character. :func:`csv_cell` also keeps spreadsheets from reading a cell as a formula.
"""

from __future__ import annotations

import codecs
import csv
import io
import json
import math
import os
import re
import tempfile
from pathlib import Path

import numpy as np

__all__ = ["SCHEMA", "OLD_SCHEMAS", "upgrade", "new_record", "write_json", "read_json",
           "write_text_atomic", "dumps", "remove_stale_temporaries", "TEMP_PREFIX", "shown", "csv_cell",
           "csv_text", "csv_row", "CSV_COLUMNS", "db_key_values", "verdict_fields", "safe_name",
           "to_atoms"]

SCHEMA = "driftwatch/run-2"
OLD_SCHEMAS = ("driftwatch/run-1",)
_UMASK = os.umask(0)
os.umask(_UMASK)
FILE_MODE = 0o666 & ~_UMASK
"""The mode the user's umask gives a new file (mkstemp and SQLite make theirs 0600 and 0644)."""


def _default(obj):
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, np.floating):
        return float(obj)
    if isinstance(obj, np.bool_):
        return bool(obj)
    if isinstance(obj, np.ndarray):
        return obj.tolist()
    if isinstance(obj, Path):
        return str(obj)
    raise TypeError(f"not JSON serialisable: {type(obj).__name__}")


def _key(k) -> str:
    """A dict key as JSON writes it (numbers, booleans and None as their JSON text)."""
    return next(iter(json.loads(json.dumps({k: 0}))))


def _plain(obj):
    """The record as plain JSON values in one pass: numpy scalars and arrays converted, tuples as
    lists, NaN/inf as None (standard JSON, no bare NaN tokens), keys as JSON writes them."""
    t = type(obj)
    if t is float:
        return obj if math.isfinite(obj) else None
    if t is str or t is int or t is bool or obj is None:
        return obj
    if t is dict:
        return {k if type(k) is str else _key(k): _plain(v) for k, v in obj.items()}
    if t is list or t is tuple:
        return [_plain(v) for v in obj]
    if isinstance(obj, float):            # numpy float64 and other float subclasses
        return _plain(float(obj))
    if isinstance(obj, (str, int)) and not isinstance(obj, np.integer):
        return obj
    if isinstance(obj, dict):
        return _plain(dict(obj))
    if isinstance(obj, (list, tuple)):
        return [_plain(v) for v in obj]
    return _plain(_default(obj))


_ONE_LINE = json.JSONEncoder(allow_nan=False, separators=(", ", ": "))   # C encoder (no indent)
_OPEN_LEVELS = 2


def _layout(obj, pad: str = "") -> str:
    """``obj`` (plain JSON values) as text: the top two levels of dicts and lists open one line per
    item, indented one space per level; each value below (a frame's entry, a column of numbers)
    is one line, written by the standard library's C encoder."""
    if len(pad) < _OPEN_LEVELS and obj and type(obj) in (dict, list):
        inner = pad + " "
        if type(obj) is dict:
            rows = [f"{inner}{_ONE_LINE.encode(k)}: {_layout(v, inner)}" for k, v in obj.items()]
            return "{\n" + ",\n".join(rows) + f"\n{pad}}}"
        return "[\n" + ",\n".join(inner + _layout(v, inner) for v in obj) + f"\n{pad}]"
    return _ONE_LINE.encode(obj)


def dumps(record: dict, indent: bool = True) -> str:
    """Standard JSON text of a record (numpy scalars converted, non-finite numbers as null).
    ``indent``: the top two levels one line per item (:func:`_layout`); False: one line."""
    plain = _plain(record)
    return _layout(plain) if indent else _ONE_LINE.encode(plain)


TEMP_PREFIX = ".driftwatch-"
"""Temporary files of :func:`write_text_atomic` are ``.driftwatch-XXXXXXXX.tmp`` (8 random
characters): recognisably driftwatch's, and short enough for any folder."""
_TEMP_NAME = re.compile(r"^\.driftwatch-[a-z0-9_]{8}\.tmp$")


def _name_bytes(exc: UnicodeEncodeError):
    """Codec error handler: an undecodable byte (surrogate escape) becomes ``\\xNN``, any other
    lone surrogate ``\\uXXXX``, so the text written is always valid UTF-8."""
    bad = exc.object[exc.start:exc.end]
    return "".join(f"\\x{ord(c) - 0xDC00:02x}" if 0xDC80 <= ord(c) <= 0xDCFF else f"\\u{ord(c):04x}"
                   for c in bad), exc.end


codecs.register_error("driftwatch-names", _name_bytes)


def write_text_atomic(path, text: str, *, fsync: bool = True) -> Path:
    """Write ``text`` to ``path`` atomically (temp file in the same folder, fsync, rename).

    The file is valid UTF-8: bytes of names that are not UTF-8 are written as ``\\xNN``.
    ``fsync=False`` skips the flush to disk (for caches: after a power cut an entry may be empty,
    which a reader must treat as missing). A failure (disk full, permissions, quota) raises
    :class:`~driftwatch.errors.OutputError` naming the file, and leaves no temporary behind."""
    from .errors import OutputError
    path = Path(path)
    tmp = None
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=TEMP_PREFIX, suffix=".tmp", dir=path.parent)
        with os.fdopen(fd, "w", encoding="utf-8", errors="driftwatch-names") as fh:
            fh.write(text)
            if fsync:
                fh.flush()
                os.fsync(fh.fileno())
        os.chmod(tmp, FILE_MODE)        # mkstemp makes 0600; give the file the user's usual mode
        os.replace(tmp, path)
        tmp = None
    except OSError as exc:
        if isinstance(exc, OutputError):
            raise
        raise OutputError(f"{path}: cannot write ({exc.strerror or exc})") from exc
    finally:
        if tmp is not None:
            try:
                os.unlink(tmp)
            except OSError:
                pass
    return path


def remove_stale_temporaries(folder) -> list[str]:
    """Delete temporary files a killed :func:`write_text_atomic` left in ``folder`` (not
    recursive; only driftwatch's own, named ``.driftwatch-XXXXXXXX.tmp``)."""
    removed = []
    try:
        entries = list(os.scandir(folder))
    except OSError:
        return removed
    for e in entries:
        if _TEMP_NAME.match(e.name) and e.is_file(follow_symlinks=False):
            try:
                os.unlink(e.path)
                removed.append(e.name)
            except OSError:
                pass
    return removed


def check_target(path) -> None:
    """Refuse a record's output file (``-o``) that exists and is not a driftwatch run record: a
    run's own output, one of its inputs, a user's file. Nothing the user had is overwritten."""
    import re
    from .errors import OutputError
    p = Path(path)
    if p.is_dir():
        raise OutputError(f"{p}: is a folder; give a file name for the record")
    if not p.exists():
        return
    try:
        with open(p, "rb") as fh:
            head = fh.read(4096)
    except OSError as exc:
        raise OutputError(f"{p}: cannot read it to check what it is ({exc.strerror or exc})") \
            from None
    if not re.match(rb'\s*\{\s*"schema"\s*:\s*"driftwatch/run-', head):    # a record starts so
        raise OutputError(f"{p}: exists and is not a driftwatch run record; refusing to overwrite "
                          f"it (remove it, or choose another file for the record)")


def write_json(record: dict, path) -> Path:
    """Write a record as JSON, atomically."""
    return write_text_atomic(path, dumps(record) + "\n")


def read_json(path) -> dict:
    """Read a record; raises ValueError naming the file for non-records."""
    try:
        with open(path, encoding="utf-8") as fh:
            data = json.load(fh)
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise ValueError(f"{path}: not a driftwatch run record (not JSON text: {exc})") from None
    if not isinstance(data, dict) or not str(data.get("schema", "")).startswith("driftwatch/run-"):
        raise ValueError(f"{path}: not a driftwatch run record (no 'schema: driftwatch/run-N')")
    if data["schema"] != SCHEMA:
        try:
            data = upgrade(data)
        except (KeyError, TypeError, ValueError) as exc:
            why = f"no {exc.args[0]!r} in it" if isinstance(exc, KeyError) and exc.args else exc
            raise ValueError(f"{path}: cannot read record of schema {data['schema']!r} "
                             f"({why})") from exc
    return data


def safe_name(text: str, limit: int = 120) -> str:
    """A file-name-safe token from a run id (no separators, no '..', no leading dot), at most
    ``limit`` bytes of UTF-8 (a name of any script fits a file system's 255-byte limit)."""
    out = "".join(c if c.isalnum() or c in "-_.+=" else "_" for c in str(text))
    out = out.replace("..", "_").lstrip(".") or "run"
    return out.encode("utf-8", "surrogatepass")[:limit].decode("utf-8", "ignore") or "run"


# C0 and C1 control characters, DEL, and the Unicode bidirectional controls (which reorder what a
# terminal shows); undecodable bytes (surrogate escapes, U+DC80..U+DCFF) and other lone surrogates
_SHOWN = {c: f"\\x{c:02x}" for c in (*range(0x20), 0x7F, *range(0x80, 0xA0))}
_SHOWN.update({0x09: "\\t", 0x0A: "\\n", 0x0D: "\\r"})
_SHOWN.update({c: f"\\u{c:04x}" for c in (*range(0x202A, 0x202F), *range(0x2066, 0x206A))})
_SHOWN.update({c: f"\\u{c:04x}" for c in range(0xD800, 0xE000)})
_SHOWN.update({c: f"\\x{c - 0xDC00:02x}" for c in range(0xDC80, 0xDD00)})


def shown(text) -> str:
    """``text`` safe to show (terminal, CSV cell, report, ase.db value): undecodable bytes and
    control characters as ``\\xNN`` (``\\t``, ``\\n``, ``\\r``), valid UTF-8, one line."""
    text = str(text)
    if text.isascii() and text.isprintable():
        return text
    return text.translate(_SHOWN)


def shown_lines(text) -> str:
    """:func:`shown` applied to each line of ``text`` (the line breaks are kept)."""
    return "\n".join(shown(line) for line in str(text).split("\n"))


_FORMULA = ("=", "+", "-", "@")


def csv_cell(value):
    """A CSV cell that a spreadsheet shows as text: names as :func:`shown` (so no tab, CR or line
    break), and text starting with ``= + - @`` that is not a number behind an apostrophe (OWASP's
    advice against CSV formula injection). Non-text values pass unchanged."""
    if not isinstance(value, str):
        return value
    text = shown(value)
    if text.startswith(_FORMULA):
        try:
            float(text)
        except ValueError:
            text = "'" + text
    return text


def csv_text(rows: list[dict], columns=None) -> str:
    """CSV text (header and one line per row; columns default to :data:`CSV_COLUMNS`), each cell
    through :func:`csv_cell`."""
    columns = list(columns or CSV_COLUMNS)
    buf = io.StringIO()
    w = csv.DictWriter(buf, fieldnames=columns, lineterminator="\n")
    w.writeheader()
    for row in rows:
        w.writerow({k: csv_cell(v) for k, v in row.items()})
    return buf.getvalue()


END_POINTS = "2 structures (initial and final only; no ionic steps between them)"
"""How an end-points run's frames are named in every output (``run.kind == "end-points"``)."""


DIAGNOSTICS = "verdicts and flags are diagnostics to check, not proofs of stability or of a phase"
"""The line every text output ends its judgement with (audit, inspect, follow)."""

CHIRAL_WORDS = ("chiral_def: sign × deformation to the nearest lattice with a mirror line (the "
                "record's chiral_distance is sign × root-space distance, another number)")
"""How the "chiral_def" column or field is said in every output (:func:`chiral_deformation`)."""


def chiral_deformation(frame: dict) -> float:
    """A layer frame's sign times its deformation (Å) to the nearest lattice with a mirror line: the
    measure ``handedness-flip`` judges, shown as "chiral_def" in every output (the root-space chiral
    distance, which grows like the square root of it, is the record's ``chiral_distance``)."""
    return float(frame["sign"]) * float(frame["deformation"]["mirror"])


def group_name(symbol, number, operations=None) -> str:
    """A group as every output names it: ``P4/mmm (123)``, or with its operation count in the cell
    ``P4/mmm (123, 32 operations)`` (what tells a group that gained a pure translation from
    itself)."""
    if not operations:
        return f"{symbol} ({number})"
    return f"{symbol} ({number}, {operations} operation{'s' if operations != 1 else ''})"


def peak_text(drift: dict) -> str:
    """" (left it on the way and came back: X Å at step N)" for a drift with an excursion
    (``peak``), else ""."""
    if not drift or drift.get("peak") is None:
        return ""
    return (f" (left it on the way and came back: {drift['peak']:.3g} Å at step "
            f"{drift['peak_step']})")


def final_scf_text(rec: dict) -> str:
    """The note on a pw.x vc-relax whose last frame is its final scf at the relaxed structure
    (the reader's ``code_settings.final_scf``), or ""."""
    frames = rec.get("frames") or []
    if not (rec.get("run", {}).get("code_settings") or {}).get("final_scf") or len(frames) < 2:
        return ""
    a, b = frames[-2], frames[-1]
    change = ""
    if isinstance(a.get("energy"), (int, float)) and isinstance(b.get("energy"), (int, float)):
        change = f" ({b['energy'] - a['energy']:+.4g} eV from that step's)"
    return (f"step {b['step']}, the last, is pw.x's final scf at the relaxed structure: the "
            f"structure of step {a['step']}, its energy{change} in a plane-wave basis rebuilt for "
            f"the final cell")


def atoms_text(atoms: dict) -> str:
    """The summary's ``atoms`` (:func:`driftwatch.rules.judge`) in words, for every output (a
    displacement below 1e-9 Å, rounding of a symmetric configuration, is said as 0)."""
    clean = lambda d: {k: (0.0 if isinstance(v, float) and abs(v) < 1e-9 else v)
                       for k, v in d.items()}
    a, b = clean(atoms["start"]), clean(atoms["end"])
    head = (f"to {group_name(atoms['symbol'], atoms['group'], atoms.get('operations'))}, the "
            f"final structure's group at symprec {atoms['symprec']:.3g} Å: ")
    own = ("; the atoms alone, each frame in its own cell (the lattice's change is the drift)"
           if atoms.get("cell_moved") else "")
    if "rms" not in a:
        return (head + f"rms {b['rms']:.3g} Å at the end (max {b['max']:.3g} Å); the first frame "
                       f"could not be measured against it (the group's operations do not pair its "
                       f"atoms: they were too far from that configuration)" + own)
    return head + (f"rms {a['rms']:.3g} Å at the start, {b['rms']:.3g} Å at the end (max "
                   f"{a['max']:.3g} -> {b['max']:.3g} Å)" + own)


def stages_text(record: dict) -> str | None:
    """The stages of a multi-stage run in words, for every output: ``relax1 (steps 0-59),
    relax2 (steps 60-64)`` (an end-points run: ``POSCAR (initial), CONTCAR (final)``); None for a
    single stage. A stage without a name is named by its file."""
    frames, run = record["frames"], record["run"]
    ends = run.get("kind") == "end-points"
    parts = []
    for st in run.get("stages") or []:
        if not st["n_frames"]:
            continue
        name = st["name"] or os.path.basename(st["source"])
        first, last = frames[st["first_frame"]], frames[st["first_frame"] + st["n_frames"] - 1]
        parts.append(f"{name} ({'final' if st['first_frame'] else 'initial'})" if ends else
                     f"{name} (steps {first['step']}-{last['step']})")
    return ", ".join(parts) or None


def new_record(run, geo, cfg: dict, frames: list[dict], *, fixed_cell: bool, versions: dict) -> dict:
    """Assemble a record from a run, its geometry, the effective config and per-frame entries."""
    from ase.data import chemical_symbols
    from ase.formula import Formula
    # Hill's order (C, H, then the others alphabetically; without C, all alphabetically), as
    # ase.db's formula column of runs.db spells it
    formula = Formula.from_list([chemical_symbols[int(z)] for z in run.numbers]).format("hill")
    kind = getattr(run, "kind", "trajectory")
    if kind == "end-points":            # the two frames are structures, not ionic steps
        for f, label in zip(frames, ("initial", "final")):
            f["label"] = label
    return {
        "schema": SCHEMA,
        "run": {
            "source": str(run.source),
            "run_dir": run.run_dir,
            "format": run.format,
            "title": run.title,
            "n_frames": int(len(run.cells)),
            "n_atoms": int(len(run.numbers)),
            "formula": formula,
            "code_settings": dict(run.code_settings),
            "warnings": list(run.warnings),
            "fixed_cell": fixed_cell,
            "position_precision": getattr(run, "position_precision", None),
            "stages": [dict(st) for st in getattr(run, "stages", ())],
            "kind": kind,
            "not_relaxation": getattr(run, "not_relaxation", None),
            "unfinished": getattr(run, "unfinished", None),
            "structure_key": getattr(run, "structure_key", None),
            "species": list(run.species) if getattr(run, "species", None) else None,
        },
        "geometry": {
            "dimension": int(geo.dimension),
            "vacuum_axis": None if geo.vacuum_axis is None else int(geo.vacuum_axis),
            "viewing_side": None if geo.viewing_side is None else [float(x) for x in geo.viewing_side],
            "reason": geo.reason,
        },
        "config": {k: v for k, v in cfg.items() if not k.startswith("_")},
        "versions": versions,
        "frames": frames,
        "structures": _structures(run, (cfg.get("record") or {}).get("structures", "final")),
    }


def _structures(run, which: str) -> dict | None:
    """The structures the record keeps (``record.structures`` in the config): ``final`` (default),
    ``all`` frames, or ``none``. Cells and cartesian positions in Å, as read."""
    if which == "none":
        return None
    idx = range(len(run.cells)) if which == "all" else [len(run.cells) - 1]
    return {"numbers": [int(z) for z in run.numbers], "pbc": [bool(p) for p in run.pbc],
            "frames": {str(i): {"cell": np.asarray(run.cells[i], float).tolist(),
                                "positions": np.asarray(run.positions[i], float).tolist()}
                       for i in idx}}


def to_atoms(record: dict, i: int = -1):
    """Frame ``i`` of a record as an ``ase.Atoms``, from the structures the record keeps (the final
    one by default; every frame with ``record.structures: all``). KeyError names what is kept."""
    from ase import Atoms
    st = record.get("structures")
    n = record["run"]["n_frames"]
    k = i + n if i < 0 else i
    if not st or str(k) not in st["frames"]:
        kept = sorted(int(x) for x in (st or {}).get("frames", {}))
        raise KeyError(f"frame {i} is not kept in this record (frames kept: {kept or 'none'}; "
                       f"set record.structures: all to keep every frame)")
    f = st["frames"][str(k)]
    atoms = Atoms(numbers=st["numbers"], positions=f["positions"], cell=f["cell"], pbc=st["pbc"])
    atoms.info["step"] = record["frames"][k]["step"]
    return atoms


CSV_COLUMNS = ("run", "source", "format", "kind", "not_relaxation", "unfinished", "dimension",
               "n_frames", "n_atoms", "formula", "fixed_cell", "verdict", "lattice_verdict",
               "lattice_initial", "lattice_final", "lattice_from_step", "drift_type",
               "drift_initial_A", "drift_final_A", "drift_peak_A", "drift_peak_step",
               "group_verdict", "group_symprec_A", "group_initial", "group_final",
               "group_from_step", "group_later_steps_checked", "atoms_group", "atoms_symprec_A",
               "atoms_start_rms_A", "atoms_end_rms_A", "flags", "recommended_symprec_A",
               "warnings", "error")
"""Columns of ``campaign.csv``; the same names (without the ``_A`` unit suffix) are the ase.db keys
(:func:`db_key_values`). ``verdict`` is the run's direction (gained, lost, changed, kept; failed);
``not_relaxation`` says what the ionic steps are when they are no relaxation, ``unfinished`` why the
run ended before the code finished it (cut short, or at its step limit; empty otherwise);
``atoms_*`` are the summary's ``atoms`` (the displacement of the first and final frames to the most
symmetric group of the final structure, :func:`atoms_text`). ``group_later_steps_checked`` is False
where spglib was not asked on every step after ``group_from_step`` (the verdict's "(not every later
step checked)": the group may have left and come back there), empty for a kept group."""


def verdict_fields(record: dict) -> dict:
    """The verdict of a record as flat fields (Å for lengths): one name and one value per fact,
    shared by the CSV row, the ase.db keys, the terminal tables and the report."""
    s = record["summary"]
    v, d, at = s["verdict"], s.get("drift") or {}, s.get("atoms") or {}
    lat, st = v["lattice"], v["structure"]
    a, b = st.get("initial") or {}, st.get("final") or {}
    # the same group type at both ends with other operation counts (pure translations gained or
    # lost): the counts tell them apart, as in the verdict's text
    ops = a.get("group") == b.get("group") and a.get("operations") != b.get("operations")
    grp = lambda g: (f"{g['symbol']} ({g['group']}" + (f", {g['operations']} operations" if ops
                                                       else "") + ")") if g.get("group") else ""
    return {
        "verdict": v["direction"], "lattice_verdict": lat["direction"],
        "lattice_initial": lat["initial"], "lattice_final": lat["final"],
        "lattice_from_step": lat.get("from_step"),
        "drift_type": d.get("type"), "drift_initial": d.get("initial"), "drift_final": d.get("final"),
        "drift_peak": d.get("peak"), "drift_peak_step": d.get("peak_step"),
        "group_verdict": st.get("direction"), "group_symprec": st.get("symprec"),
        "group_initial": grp(a), "group_final": grp(b),
        "group_from_step": st.get("from_step"),
        "group_later_steps_checked": st.get("checked_after"),
        "atoms_group": group_name(at["symbol"], at["group"], at["operations"])
        if at.get("operations") else "",
        "atoms_symprec": at.get("symprec"), "atoms_start_rms": at.get("start", {}).get("rms"),
        "atoms_end_rms": at.get("end", {}).get("rms"),
        "recommended_symprec": s["tolerance"].get("recommended_symprec"),
    }


def unanalysed_rows(failed, skipped) -> list[dict]:
    """CSV rows of an audit's failed runs (``{run, source, error}``) and skipped ones (``{run,
    source, reason, include}``), as campaign.csv and ``tables.runs_table`` give them."""
    return ([csv_row({"error": f["error"], "source": f["source"]}, f["run"]) for f in failed]
            + [csv_row({"error": f"skipped: {k['reason']}; to include: {k['include']}",
                        "source": k["source"]}, k["run"]) | {"verdict": "skipped"}
               for k in skipped])


def csv_row(record: dict, run_id: str = "") -> dict:
    """One CSV row (dict keyed by CSV_COLUMNS) of a record, or of a failed run ``{"error": ...}``."""
    if "error" in record and "summary" not in record:
        return {c: "" for c in CSV_COLUMNS} | {"run": run_id, "source": record.get("source", ""),
                                                "verdict": "failed", "error": record["error"]}
    r, v = record["run"], verdict_fields(record)
    row = {"run": run_id, "source": r["source"], "format": r["format"],
           "kind": r.get("kind", "trajectory"), "not_relaxation": r.get("not_relaxation") or "",
           "unfinished": r.get("unfinished") or "",
           "dimension": record["geometry"]["dimension"], "n_frames": r["n_frames"],
           "n_atoms": r["n_atoms"], "formula": r["formula"], "fixed_cell": r["fixed_cell"],
           "flags": " ".join(sorted({f["code"] for f in record["flags"]})),
           "warnings": " | ".join(r["warnings"]), "error": ""}
    for key, val in v.items():
        col = key + "_A" if key + "_A" in CSV_COLUMNS else key
        row[col] = _fmt(val) if isinstance(val, float) else ("" if val is None else val)
    return row


def _fmt(x):
    return "" if x is None else f"{x:.6g}"


def db_key_values(record: dict, run_id: str) -> dict:
    """ase.db key-value pairs for a run: the CSV's names, no unit suffix (lengths in Å), no empty
    values; ``flag_<code>`` (dashes as underscores) for each flag raised. Documented in
    ``docs/record.md``; query with ``ase db runs.db "verdict=gained"``."""
    r = record["run"]
    kv = {"run_id": run_id, "dimension": int(record["geometry"]["dimension"]),
          "n_frames": int(r["n_frames"]), "fixed_cell": bool(r["fixed_cell"]),
          "source_format": r["format"], "kind": r.get("kind", "trajectory"),
          "n_flags": len(record["flags"])}
    for key in ("not_relaxation", "unfinished"):
        if r.get(key):
            kv[key] = r[key]
    for key, val in verdict_fields(record).items():
        if isinstance(val, float):
            if math.isfinite(val):
                kv[key] = float(val)
        elif val not in (None, ""):
            kv[key] = val
    for code in sorted({f["code"] for f in record["flags"]}):
        kv["flag_" + code.replace("-", "_")] = True
    return kv


def upgrade(record: dict, cfg: dict | None = None) -> dict:
    """A record of an older schema (``driftwatch/run-1``) brought to this one, for reports: flags and
    summary are judged again from its frames with its own config (the new threshold keys taken from
    the default where the old config had none). Its frames carry no per-frame group relations, so
    the structure level is compared by group number and operation count only."""
    if record.get("schema") == SCHEMA:
        return record
    if record.get("schema") not in OLD_SCHEMAS:
        raise ValueError(f"unknown record schema {record.get('schema')!r}")
    from . import config as _config, rules, track
    rec = json.loads(json.dumps(record))
    cfg = _config.load() if cfg is None else cfg
    old = rec.get("config") or {}
    for key, new in (("snapped", "lattice"),):
        for k in ("within", "start_away"):
            if k in old.get("rules", {}).get(key, {}):
                cfg["rules"][new][k] = old["rules"][key][k]
    precs = track.structure_symprecs(cfg)
    for f in rec["frames"]:
        spec = f.get("symmetry")
        if not spec:
            continue
        idx = [rules.grid_index(spec, s) for s in precs]
        f["structure"] = {"symprec": precs, "group": [spec["group"][i] for i in idx],
                          "symbol": [spec["group_symbol"][i] for i in idx],
                          "operations": [spec["operations"][i] for i in idx],
                          "relation": ["unknown"] * len(idx)}
    rec["schema"] = SCHEMA
    rec["run"].setdefault("position_precision", None)
    rec["flags"], rec["summary"] = rules.judge(rec, cfg)
    rec["upgraded_from"] = record.get("schema")
    return rec
