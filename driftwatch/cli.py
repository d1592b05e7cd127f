"""Command line: ``driftwatch SUBCOMMAND ...``. Thin: parse, call, print.

Exit codes (all subcommands):
  0  success
  1  an input, config or output problem (one-line message; ``--debug`` for the traceback)
  2  usage error (bad options)
  3  a flag listed in ``--reject-on`` (or the config's ``reject_on``) was raised
  4  audit only: finished, but some runs could not be analysed (see the summary)
  141  the reader of standard output went away (``| head``); nothing more is printed
"""

from __future__ import annotations

import argparse
import errno
import os
import sys
from pathlib import Path

EXIT_OK, EXIT_ERROR, EXIT_USAGE, EXIT_GATED, EXIT_PARTIAL = 0, 1, 2, 3, 4
EXIT_PIPE = 141
"""The reader of standard output went away (``driftwatch inspect ... | head``): what a shell
reports for a tool stopped by SIGPIPE; nothing is printed."""

_EPILOG = """exit codes: 0 ok, 1 input/config/output error, 2 usage error,
3 a flag named in --reject-on was raised (3 wins over 4), 4 (audit) some runs failed,
141 standard output closed early (| head): the rest is not printed.
Verdicts: gained, lost, changed or kept symmetry (lattice and spglib group).
Flags are diagnostics to check, not proofs of stability or of a phase."""
_EPILOG_PLAIN = """exit codes: 0 ok, 1 input/config/output error, 2 usage error,
141 standard output closed early (| head): the rest is not printed."""
"""For the commands that judge no run against --reject-on (tolerance, report, formats)."""


def _common(p: argparse.ArgumentParser, reject=True) -> None:
    from .config import PRESETS       # light: PyYAML only
    p.add_argument("-c", "--config", metavar="YAML|PRESET",
                   help=f"config file or preset ({', '.join(PRESETS)}); "
                        "default: $DRIFTWATCH_CONFIG or 'default'")
    p.add_argument("--json", action="store_true", help="print machine-readable JSON on stdout")
    p.add_argument("--debug", action="store_true", help="show full tracebacks on errors")
    if reject:
        p.add_argument("--reject-on", metavar="FLAGS", default=None,
                       help="comma-separated flag codes (or lattice, structure, tolerance, code, "
                            "any) that make the command exit with status 3, e.g. "
                            "'lattice-gained,group-lost'")


def _number(kind, low: float, strict: bool):
    """An argparse type: ``kind`` (int or float) above ``low`` (or at least ``low``)."""
    def parse(text):
        try:
            value = kind(text)
        except ValueError:
            raise argparse.ArgumentTypeError(f"not a number: {text!r}") from None
        if value != value or value < low or (strict and value == low):
            raise argparse.ArgumentTypeError(f"{text} is not {'above' if strict else 'at least'} "
                                             f"{low:g}")
        return value
    parse.__name__ = kind.__name__
    return parse


def _parser() -> argparse.ArgumentParser:
    top = argparse.ArgumentParser(
        prog="driftwatch",
        description="Track whether relaxations changed a structure's symmetry: continuous lattice "
                    "distances to every higher-symmetry type, per ionic step, next to spglib's "
                    "verdict across tolerances.",
        epilog=_EPILOG, formatter_class=argparse.RawDescriptionHelpFormatter)
    top.add_argument("--version", action="store_true", help="print the version and exit")
    sub = top.add_subparsers(dest="command", metavar="COMMAND")
    fmt = argparse.RawDescriptionHelpFormatter

    p = sub.add_parser("inspect", help="one run in detail: per-step table, flags, summary",
                       formatter_class=fmt, epilog="examples:\n"
                       "  driftwatch inspect runs/L-03/            # a QE or VASP run folder\n"
                       "  driftwatch inspect relax.traj --json > record.json\n"
                       "  driftwatch inspect OUTCAR --all-frames --reject-on lattice-gained\n\n" + _EPILOG)
    p.add_argument("path", help="trajectory file or run folder")
    p.add_argument("-f", "--format", metavar="NAME",
                   help="input format, overriding detection (names: 'driftwatch formats')")
    p.add_argument("--all-frames", action="store_true",
                   help="a tolerance spectrum on every frame (15-30 spglib calls a frame: about "
                        "30x the default's time on a long run)")
    p.add_argument("-o", "--output", metavar="FILE", help="also write the run record (JSON) here")
    _common(p)

    p = sub.add_parser("audit", help="audit a campaign of runs under one or more folders",
                       formatter_class=fmt, epilog="examples:\n"
                       "  driftwatch audit campaign/ -o audit-out/\n"
                       "  driftwatch audit a/ b/ --include '*relax*' --exclude '*/old/*' -j 2\n"
                       "  driftwatch audit campaign/ --scheduler tcp://head:8786 --db runs.db\n\n"
                       + _EPILOG)
    p.add_argument("roots", nargs="+", help="folders or files to search for runs")
    p.add_argument("-o", "--output", metavar="DIR", default=None,
                   help="output folder (default: driftwatch-audit; an existing non-empty folder "
                        "from another campaign is refused unless --overwrite)")
    p.add_argument("--include", action="append", default=[], metavar="GLOB",
                   help="only runs whose path below the root matches, e.g. 'L0*' or '*/relax*' "
                        "(repeatable)")
    p.add_argument("--exclude", action="append", default=[], metavar="GLOB",
                   help="skip runs whose path below the root matches (repeatable)")
    p.add_argument("-j", "--workers", type=_number(int, 1, False), default=None,
                   help="local worker processes (default: number of cores)")
    p.add_argument("--scheduler", metavar="ADDRESS", help="Dask scheduler address (needs dask[distributed])")
    p.add_argument("--db", metavar="URL", help="ase.db file or URL (default: OUTPUT/runs.db)")
    p.add_argument("--no-cache", action="store_true", help="ignore cached results")
    p.add_argument("--overwrite", action="store_true",
                   help="allow replacing the audit of other roots in the output folder, or adding "
                        "an audit to a folder of other files (never replacing a file of the "
                        "audit's names that no audit wrote)")
    p.add_argument("--no-report", action="store_true", help="skip the HTML report")
    p.add_argument("--all-frames", action="store_true",
                   help="a tolerance spectrum on every frame of every run "
                        "(selection.all_frames; 15-30 spglib calls a frame)")
    p.add_argument("--progress", choices=("auto", "on", "off"), default="auto",
                   help="progress on stderr: updated in place on a terminal, a dated line every "
                        "30 s in a log (auto, on); off: none. The summary table always goes to "
                        "stdout (not with --json)")
    _common(p)

    p = sub.add_parser("follow", help="follow a running VASP or QE job (or a growing trajectory)",
                       formatter_class=fmt, epilog="examples:\n"
                       "  driftwatch follow run/pw.out\n"
                       "  driftwatch follow run/ --stop-on lattice-gained     # soft stop via STOPCAR/.EXIT\n"
                       "  driftwatch follow run/ --stop-on lattice-gained --dry-run\n\n" + _EPILOG)
    p.add_argument("path", help="output file or run folder")
    p.add_argument("-f", "--format", help="adapter name, overriding detection")
    p.add_argument("--stop-on", metavar="FLAGS", help="request the code's soft stop when one of these flags is raised (a change counts once it held for rules.persistence.steps steps)")
    p.add_argument("--dry-run", action="store_true", help="say what the soft stop would do; write nothing")
    p.add_argument("--idle", type=_number(float, 0, False), default=300.0, metavar="SECONDS",
                   help="end after this long without growth (default 300)")
    p.add_argument("--poll", type=_number(float, 0, True), default=2.0, metavar="SECONDS",
                   help="poll interval")
    p.add_argument("-o", "--output", metavar="FILE", help="write the run record (JSON) here")
    _common(p)

    p = sub.add_parser("tolerance", help="tolerance study of one structure: spglib across symprec",
                       formatter_class=fmt, epilog="examples:\n"
                       "  driftwatch tolerance CONTCAR\n"
                       "  driftwatch tolerance relax.traj --frame 0 --json\n\n" + _EPILOG_PLAIN)
    p.add_argument("path", help="structure or trajectory file, or run folder")
    p.add_argument("-f", "--format", help="adapter name, overriding detection")
    p.add_argument("--frame", type=int, default=-1, help="frame index (default: last)")
    _common(p, reject=False)

    p = sub.add_parser("report", help="rebuild the HTML report from saved run records",
                       formatter_class=fmt, epilog="examples:\n"
                       "  driftwatch report audit-out/records -o audit-out/report --overwrite\n"
                       "      (rebuilds the audit's own report in place)\n"
                       "  driftwatch report audit-out/records -o my-report\n\n" + _EPILOG_PLAIN)
    p.add_argument("records", nargs="+", help="record files (JSON) or folders of them")
    p.add_argument("-o", "--output", metavar="DIR", required=True, help="report folder")
    p.add_argument("--overwrite", action="store_true", help="replace an existing report folder")
    _common(p, reject=False)

    p = sub.add_parser("formats", help="list the input formats driftwatch reads",
                       formatter_class=fmt, epilog="examples:\n"
                       "  driftwatch formats\n  driftwatch formats --json | python -m json.tool\n\n"
                       + _EPILOG_PLAIN)
    p.add_argument("--json", action="store_true", help="the formats as JSON on stdout")
    p.add_argument("--debug", action="store_true", help="show the traceback of an error")
    return top


class _UsageError(Exception):
    """A command-line value argparse could not check (exit 2, as argparse's own errors)."""


def _option_codes(text: str, option: str) -> list[str]:
    from .errors import ConfigError
    from .rules import check_codes
    try:
        return check_codes(text.split(","), option)
    except ConfigError as exc:
        raise _UsageError(str(exc)) from None


def _reject_codes(args, cfg) -> list[str]:
    from .rules import check_codes
    if getattr(args, "reject_on", None):
        return _option_codes(args.reject_on, "--reject-on")
    where = f"reject_on ({cfg.get('_reject_on_from') or 'config'})"
    return check_codes(cfg.get("reject_on", []), where)


def _shown(text) -> str:
    """Text safe for a terminal or a log: in names, control characters (terminal escapes) and
    bytes that are not UTF-8 are shown as ``\\xNN``; line breaks of the text are kept."""
    from .records import shown_lines
    return shown_lines(text)


def _print_json(obj) -> None:
    """The JSON on stdout, in pieces of 64 kB: a reader that goes away mid-way (``| head -c``)
    is noticed at the next piece (exit 141) instead of the rest vanishing into a closed pipe."""
    from .records import dumps
    text, piece = dumps(obj) + "\n", 1 << 16
    for i in range(0, len(text), piece):
        sys.stdout.write(text[i:i + piece])
        sys.stdout.flush()


def _fmt(x, spec=".3g"):
    return "-" if x is None else format(x, spec)


def _shown_types(rec: dict) -> list[str]:
    """Columns of the per-step table: every type the run started or ended at, gained, lost or
    neared, and (layers) all four 2D types."""
    s, dim = rec["summary"], rec["geometry"]["dimension"]
    if dim == 2:
        return ["op", "oc", "tp", "hp"]
    lat = s["verdict"]["lattice"]
    picks = [lat["initial"], lat["final"], lat["gained"], lat["lost"], lat.get("nearing"),
             (s["drift"] or {}).get("type"), s["final"]["nearest"]]
    return list(dict.fromkeys(t for t in picks if t and t != "aP"))


def _group_cell(f: dict, symprec: float) -> str:
    st = f.get("structure")
    if not st:
        return ""
    from .rules import _group_of
    g = _group_of(f, symprec)
    return f"{g[1]} ({g[0]})" if g and g[0] else ("failed" if g else "")


def _inspect_table(rec: dict) -> str:
    """Per-step table (deformation to each type shown, sign for layers, spglib's group at the
    verdict's symprec), then the verdict, flags and advice."""
    from .records import (CHIRAL_WORDS, DIAGNOSTICS, END_POINTS, atoms_text, chiral_deformation,
                          final_scf_text, peak_text, stages_text)
    from .rules import NAMES
    frames, dim = rec["frames"], rec["geometry"]["dimension"]
    s = rec["summary"]
    v = s["verdict"]
    shown = _shown_types(rec)
    judge_at = v["structure"].get("symprec") or 1e-3
    head = ["step", "energy/eV", "max_force/(eV/Å)"] + [f"{t}/Å" for t in shown]
    head += (["sign", "chiral_def/Å"] if dim == 2 else []) + [f"group@{judge_at:g}Å"]
    rows = [head]
    for f in frames:
        row = [f.get("label") or str(f["step"]), _fmt(f["energy"], ".6f"), _fmt(f.get("fmax"), ".3g")]
        row += [_fmt(f["deformation"][t]) for t in shown]
        if dim == 2:
            row += [f"{f['sign']:+d}" if f["sign"] else "0", _fmt(chiral_deformation(f))]
        row.append(_group_cell(f, judge_at))
        rows.append(row)
    widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
    lines = ["  ".join(c.rjust(w) for c, w in zip(r, widths)) for r in rows]
    lines.append("")
    kind = "layer (2D lattice)" if dim == 2 else "bulk (3D lattice)"
    n = rec["run"]["n_frames"]
    ends = rec["run"].get("kind") == "end-points"
    frames_word = END_POINTS if ends else f"{n} frame{'s' if n != 1 else ''}"
    blank = any(not r[-1] for r in rows[1:])
    lines.append(f"{rec['run']['source']}: {kind}, {frames_word}, "
                 f"{rec['run']['formula']}; type columns: deformation (Å, on spglib's symprec "
                 f"scale) "
                 f"to each Bravais type{'; ' + CHIRAL_WORDS if dim == 2 else ''}; "
                 f"a type is held within {rec['config']['rules']['lattice']['within']:g} Å"
                 + ("; group column blank where spglib was not asked (--all-frames asks it on every "
                    "step)" if blank else ""))
    if "stands out" in (rec["geometry"].get("reason") or ""):
        lines.append(f"    note: {rec['geometry']['reason']}")
    stages = stages_text(rec)
    if stages:
        lines.append(f"  stages: {stages}")
    lines.append(f" verdict: {v['text']}")
    d = s.get("drift")
    if d:
        lines.append(f"   drift: deformation to {d['type']} ({NAMES[d['type']]}) "
                     f"{_fmt(d['initial'])} Å -> {_fmt(d['final'])} Å{peak_text(d)}")
    at = s.get("atoms")
    if at:
        lines.append(f"   atoms: {atoms_text(at)}")
    for key in ("lattice_note", "cell_held"):
        if s.get(key):
            lines.append(f"    note: {s[key]}")
    final_scf = final_scf_text(rec)
    if final_scf:
        lines.append(f"    note: {final_scf}")
    if s.get("supercell"):
        lines.append(f"    note: {s['supercell']['text']}")
    if s.get("spglib_lattice"):
        lines.append(f"    note: {s['spglib_lattice']['text']}")
    tol = s["tolerance"]
    lines.append(f" symprec: {tol['reason']}")
    for w in rec["run"]["warnings"]:
        lines.append(f" warning: {w}")
    for fl in rec["flags"]:
        at = frames[fl["frame"]].get("label") or f"step {fl['step']}"
        lines.append(f"    flag: {fl['code']} ({at}): {fl['message']}")
    if not rec["flags"]:
        lines.append("   flags: none")
    lines.append(DIAGNOSTICS)
    return "\n".join(lines)


def _cmd_inspect(args) -> int:
    from . import config as _config, records
    from .track import analyze
    overrides = {"selection.all_frames": True} if args.all_frames else None
    cfg = _config.load(args.config, overrides)
    codes = _reject_codes(args, cfg)
    if args.output:
        records.check_target(args.output)
    rec = analyze(args.path, cfg, format=args.format)
    if args.output:
        records.write_json(rec, args.output)
    if args.json:
        _print_json(rec)
    else:
        print(_shown(_inspect_table(rec)))
    return _gate_record(rec, codes)


def _gated(hits, not_gated=()) -> int:
    """EXIT_GATED, said on stderr with the runs and flags that caused it, when ``hits`` (pairs of
    run and flag dict) is not empty; else EXIT_OK. ``not_gated``: such pairs of runs that are no
    relaxation (MD, single points, band images), said and not counted."""
    def said(pairs):
        runs = list(dict.fromkeys(run for run, _ in pairs))
        shown = "; ".join(f"{run}: " + ", ".join(f"{f['code']} (step {f['step']})"
                                                 for r, f in pairs if r == run)
                          for run in runs[:5])
        return (f"{len(runs)} run{'s' if len(runs) != 1 else ''}: {shown}"
                + (f"; ... ({len(runs) - 5} more)" if len(runs) > 5 else ""))
    if not_gated:
        print(f"driftwatch: not gated by --reject-on: flags it names on no relaxation (molecular "
              f"dynamics, a single point, a band image: marked ~) on {said(not_gated)}",
              file=sys.stderr)
    if not hits:
        return EXIT_OK
    print(f"driftwatch: exit {EXIT_GATED}: a flag named by --reject-on was raised on "
          f"{said(hits)}", file=sys.stderr)
    return EXIT_GATED


def _gate_record(rec: dict, codes) -> int:
    """:func:`_gated` for one run's record (``rules.gate``)."""
    from .rules import gate
    rejected, said = gate(rec["flags"], codes, rec["run"].get("not_relaxation"))
    src = rec["run"]["source"]
    return _gated([(src, f) for f in rejected], [(src, f) for f in said])


def _cmd_tolerance(args) -> int:
    from . import config as _config
    from .adapters import read_run
    from .records import group_name
    from .rules import advice, inversion_by_content, shown_breakpoints
    from .symmetry import SWEEP_STEP
    from .track import angle_check_entry, classified, symmetry_entry
    cfg = _config.load(args.config)
    run = read_run(args.path, format=args.format)
    n = len(run.cells)
    i = args.frame if args.frame >= 0 else n + args.frame
    if not 0 <= i < n:
        from .errors import InputError
        raise InputError(args.path, f"frame {args.frame} out of range (the run has {n} frames)")
    run, geo = classified(run, cfg)
    spec = symmetry_entry(run, i, geo, cfg)
    spec.pop("calls", None)
    spec["angle_check"] = angle_check_entry(run, geo, cfg, i, spec)
    adv = advice(spec, min_plateau=cfg["tolerance"]["min_plateau"],
                 precision=getattr(run, "position_precision", None),
                 inversion_by_content=inversion_by_content(
                     run.natoms, len(set(run.symmetry_types.tolist()))))
    out = {"source": run.source, "frame": i, "dimension": geo.dimension, "spectrum": spec,
           "advice": adv}
    if args.json:
        _print_json(out)
        return EXIT_OK
    kind = "layer group" if geo.dimension == 2 else "space group"
    stage = next((st for st in run.stages or () if st["first_frame"] <= i <
                  st["first_frame"] + st["n_frames"]), None)
    named = stage and Path(stage["source"]).name
    where = f"frame {i} (step {int(run.steps[i])}" + (
        "" if not stage else f", in stage {stage['name']}" if named == stage["name"] else
        f", in stage {stage['name']}: {named}") + ")"
    print(f"{_shown(run.source)}, {where}: {kind} and lattice type across symprec (Å), "
          f"angle_tolerance {spec['angle_tolerance']:g} deg")
    print(f"{'symprec/Å':>10}  {kind:>22}  {'ops':>4}  lattice")
    floor = adv.get("resolution")
    for x, g, sym, ops, lat in zip(spec["symprec"], spec["group"], spec["group_symbol"],
                                   spec["operations"], spec["lattice"]):
        note = "  (below the file's printed precision)" if floor and x < floor else ""
        print(f"{x:10.3g}  {sym + ' (' + str(g) + ')':>22}  {ops:>4}  {lat}{note}")
    failed = [f for f in spec.get("failures") or () if f.get("kind") == "group"]
    if failed:                               # the rows of group 0: spglib's own reason
        why = sorted({f["message"] for f in failed})
        print(f"spglib found no {kind} at {len(failed)} of {len(spec['symprec'])} symprecs (shown "
              f"as (0)): {'; '.join(why)}")

    def said(b, end):                        # a group by its name, as every other output says it
        if b["kind"] != "group" or not b.get(f"{end}_symbol"):
            return str(b[end])
        same = b["from"] == b["to"]          # one type, other operation counts: say the counts
        return group_name(b[f"{end}_symbol"], b[end], b.get(f"{end}_operations") if same else None)
    for b in shown_breakpoints(spec["breakpoints"], cfg["tolerance"]["min_plateau"],
                               (min(spec["symprec"]), max(spec["symprec"]))):
        if b["changes"] > 1:
            print(f"breakpoints ({b['kind']}): {said(b, 'from')} and {said(b, 'to')} alternate, "
                  f"{b['changes']} changes between {b['low']:.3g} and {b['high']:.3g} Å (spglib "
                  f"flickers)")
        else:
            print(f"breakpoint ({b['kind']}): {said(b, 'from')} -> {said(b, 'to')} between "
                  f"{b['low']:.3g} and {b['high']:.3g} Å")
    if spec["breakpoints"]:
        print(f"(breakpoints are searched between grid points whose verdicts differ, and in steps "
              f"of a factor {spec['precision'] ** SWEEP_STEP:.4g} around a flicker the probes "
              f"detect; a window of another verdict that no probe meets, inside a range or "
              f"between two grid points of one verdict, is not seen: a range is spglib's verdict "
              f"at the symprecs asked)")
    for d in spec["displacement"].values():
        if "rms" not in d:
            print(f"to group {d['group']} ({d.get('operations')} operations, symprec "
                  f"{d['symprec']:.3g} Å): not measured ({d['error']})")
            continue
        print(f"to {group_name(d['symbol'], d['group'], d['operations'])}: atoms move rms "
              f"{d['rms']:.3g} Å, max {d['max']:.3g} Å; lattice strain {d['strain']:.2g} "
              f"(dimensionless)")
    print(f"symprec: {adv['reason']}")
    return EXIT_OK


def _cmd_audit(args) -> int:
    from . import config as _config
    from .campaign import audit
    cfg = _config.load(args.config, {"selection.all_frames": True} if args.all_frames else None)
    codes = _reject_codes(args, cfg)
    result = audit(args.roots, args.output, config=cfg, include=args.include, exclude=args.exclude,
                   workers=args.workers, scheduler=args.scheduler, db=args.db,
                   use_cache=not args.no_cache, overwrite=args.overwrite, report=not args.no_report,
                   progress=args.progress, reject_on=codes, quiet=bool(args.json))
    if args.json:
        _print_json(result)
    code = _gated([(r["run"], r) for r in result.get("rejected") or ()],
                  [(r["run"], r) for r in result.get("not_gated") or ()])
    if code:
        return code
    return EXIT_PARTIAL if result.get("failed") else EXIT_OK


def _cmd_follow(args) -> int:
    from . import config as _config
    from .live import follow
    cfg = _config.load(args.config)
    codes = _reject_codes(args, cfg)
    stop = _option_codes(args.stop_on, "--stop-on") if args.stop_on else []
    rec = follow(args.path, config=cfg, format=args.format, stop_on=stop, dry_run=args.dry_run,
                 idle=args.idle, poll=args.poll, output=args.output, quiet=args.json)
    if args.json:
        _print_json(rec)
    return _gate_record(rec, codes)


def _cmd_report(args) -> int:
    from .report import build
    bad: list = []
    index = build(args.records, args.output, overwrite=args.overwrite, unusable=bad)
    for src, why in bad:
        print(_shown(f"driftwatch: warning: {src}: not used ({' '.join(str(why).split())})"),
              file=sys.stderr)
    if args.json:
        _print_json({"index": str(index)})
    else:
        print(_shown(f"report: {index}"))
    return EXIT_OK


def _cmd_formats(args) -> int:
    from .adapters import formats
    table = formats()
    if args.json:
        _print_json(table)
    else:
        width = max(map(len, table), default=0)
        for name, desc in table.items():
            print(f"{name:{width}}  {desc}")
    return EXIT_OK


_COMMANDS = {"inspect": _cmd_inspect, "audit": _cmd_audit, "follow": _cmd_follow,
             "tolerance": _cmd_tolerance, "report": _cmd_report, "formats": _cmd_formats}


_STREAM_ERRNOS = (errno.ENOSPC, errno.EDQUOT, errno.EIO, errno.EFBIG)
"""What writing the standard output can fail with once its file system is full or gone (every
file driftwatch writes itself is named in its own error)."""


def main(argv=None) -> int:
    """Entry point of the ``driftwatch`` console script; returns the exit code."""
    for stream in (sys.stdout, sys.stderr):   # a non-UTF-8 locale cannot encode every name
        if (getattr(stream, "encoding", None) or "").lower().replace("-", "") != "utf8" and \
                hasattr(stream, "reconfigure"):
            stream.reconfigure(errors="backslashreplace")
    parser = _parser()
    args = parser.parse_args(argv)
    if args.version:
        from . import __version__
        print(f"driftwatch {__version__}")
        return EXIT_OK
    if not args.command:
        parser.print_help(sys.stderr)
        return EXIT_USAGE
    try:
        code = _COMMANDS[args.command](args)
        sys.stdout.flush()            # a closed pipe shows here, not as a warning at exit
        return code
    except BrokenPipeError:
        os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())   # nothing left to flush
        return EXIT_PIPE
    except KeyboardInterrupt as exc:
        print(_shown(f"driftwatch: interrupted{f': {exc}' if str(exc) else ''}"), file=sys.stderr)
        return 130
    except _UsageError as exc:
        print(_shown(f"driftwatch: error: {exc}"), file=sys.stderr)
        return EXIT_USAGE
    except Exception as exc:  # one line for the user; the traceback only with --debug
        if args.debug:
            raise
        from .errors import DriftwatchError
        if isinstance(exc, DriftwatchError):
            msg = str(exc)
        elif isinstance(exc, OSError) and exc.filename:
            msg = f"{exc.filename}: {exc.strerror or exc}"
        elif isinstance(exc, OSError) and exc.errno in _STREAM_ERRNOS:   # a full log disk
            os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())   # nothing to flush
            msg = f"standard output: {exc.strerror or exc}"
        elif isinstance(exc, ImportError) and str(exc).startswith("driftwatch needs "):
            msg = str(exc)                   # a library older than driftwatch runs on
        else:
            msg = f"{type(exc).__name__}: {exc} (internal error; rerun with --debug and report it)"
        from .records import shown
        print(f"driftwatch: error: {shown(msg)}", file=sys.stderr)   # one line, names escaped
        return EXIT_ERROR


if __name__ == "__main__":
    sys.exit(main())
