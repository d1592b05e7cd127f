"""The command line, run as a user runs it (subprocesses of the installed entry point's module)."""

import json
import re
import subprocess
import sys
from pathlib import Path

import pytest

QE = Path(__file__).parent / "data" / "qe"


def dw(*args, cwd=None, timeout=300):
    return subprocess.run([sys.executable, "-m", "driftwatch", *map(str, args)], capture_output=True,
                          text=True, cwd=cwd, timeout=timeout)


def test_help_is_light_and_lists_subcommands():
    code = ("import sys; from driftwatch.cli import main\n"
            "try:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
            "heavy = [m for m in ('pymatgen', 'spglib', 'ase', 'matplotlib') if m in sys.modules]\n"
            "print('HEAVY', heavy)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True).stdout
    for sub in ("inspect", "audit", "follow", "tolerance", "report"):
        assert sub in out
    assert "HEAVY []" in out


@pytest.mark.parametrize("sub", ["inspect", "audit", "follow", "tolerance", "report"])
def test_every_subcommand_has_help_with_examples_and_exit_codes(sub):
    r = dw(sub, "--help")
    assert r.returncode == 0
    assert "examples:" in r.stdout and "exit codes" in r.stdout and "--json" in r.stdout


def test_a_reader_that_goes_away_stops_the_output_quietly():
    """``driftwatch inspect RUN | true``: the reader has exited before anything is written, so
    every write hits a closed pipe. The command stops with 141 (what a shell reports for a tool
    stopped by SIGPIPE; common practice for Unix filters) and prints no error or traceback."""
    for args in (["inspect", QE / "layer_oblique_to_hex"], ["inspect", QE / "layer_oblique_to_hex",
                                                           "--json"], ["formats"]):
        proc = subprocess.Popen([sys.executable, "-m", "driftwatch", *map(str, args)],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE)
        proc.stdout.close()                           # the reader is gone before the first write
        err = proc.stderr.read().decode()
        assert proc.wait(timeout=300) == 141 and err == "", (args, err)


def test_inspect_table_json_and_gate(tmp_path):
    run = QE / "layer_oblique_to_hex"
    r = dw("inspect", run)
    assert r.returncode == 0, r.stderr
    assert "verdict: gained: lattice mp -> hp" in r.stdout
    assert "flag: lattice-gained (step" in r.stdout
    # the judgement ends with the line every text output ends it with (audit, inspect, follow),
    # flags or none (a new user's field trial: inspect, with flags, had none)
    said = "verdicts and flags are diagnostics to check, not proofs of stability or of a phase"
    assert r.stdout.rstrip().endswith(said)
    assert dw("follow", run, "--idle", "1").stdout.rstrip().endswith(said)
    r = dw("inspect", run, "--json", "-o", tmp_path / "rec.json")
    rec = json.loads(r.stdout)
    assert rec["schema"] == "driftwatch/run-2"
    assert json.loads((tmp_path / "rec.json").read_text())["summary"] == rec["summary"]
    # pipeline use: a flag named in --reject-on makes the command exit 3, and says why on stderr
    r = dw("inspect", run, "--reject-on", "lattice-gained")
    step = next(f["step"] for f in rec["flags"] if f["code"] == "lattice-gained")
    assert r.returncode == 3 and r.stderr.strip().endswith(
        f"a flag named by --reject-on was raised on 1 run: {rec['run']['source']}: "
        f"lattice-gained (step {step})")
    assert dw("inspect", run, "--reject-on", "lattice").returncode == 3
    assert dw("inspect", run, "--reject-on", "handedness-flip").returncode == 0


def test_errors_are_one_line_and_name_the_file(tmp_path):
    empty = tmp_path / "empty.traj"
    empty.write_bytes(b"")
    r = dw("inspect", empty)
    assert r.returncode == 1
    lines = r.stderr.strip().splitlines()
    assert len(lines) == 1 and str(empty) in lines[0] and "Traceback" not in r.stderr
    r = dw("inspect", tmp_path / "missing.out")
    assert r.returncode == 1 and "missing.out" in r.stderr and len(r.stderr.strip().splitlines()) == 1
    r = dw("inspect", QE / "layer_oblique_to_hex", "--reject-on", "colapsed")   # a usage error
    assert r.returncode == 2 and "unknown flag code" in r.stderr
    r = dw("inspect", QE / "layer_oblique_to_hex", "--reject-on", "snapped")
    assert r.returncode == 2 and "snapped is now lattice-gained" in r.stderr
    r = dw()                                  # no command: the help, on stderr (a usage error)
    assert r.returncode == 2 and r.stdout == "" and "usage: driftwatch" in r.stderr
    bad = tmp_path / "bad.yaml"
    bad.write_text("rules:\n  lattice:\n    within: 0.001\n")
    r = dw("inspect", QE / "layer_oblique_to_hex", "-c", bad)
    assert r.returncode == 1 and "rules.lattice.within: missing unit" in r.stderr
    bad.write_text("rules:\n  snapped:\n    within: 1e-3 Å\n")
    r = dw("inspect", QE / "layer_oblique_to_hex", "-c", bad)
    assert r.returncode == 1 and "'rules.snapped' was renamed: use 'rules.lattice'" in r.stderr
    assert dw("inspect").returncode == 2  # argparse usage error


def test_tolerance_subcommand():
    r = dw("tolerance", QE / "layer_oblique_to_hex", "--json")
    assert r.returncode == 0, r.stderr
    out = json.loads(r.stdout)
    assert out["dimension"] == 2 and out["spectrum"]["symprec"][0] == pytest.approx(1e-5)
    r = dw("tolerance", QE / "layer_oblique_to_hex", "--frame", "0")
    assert r.returncode == 0 and "layer group" in r.stdout
    r = dw("tolerance", QE / "layer_oblique_to_hex", "--frame", "9999")
    assert r.returncode == 1 and "out of range" in r.stderr


def test_formats_lists_registry():
    r = dw("formats", "--json")
    names = json.loads(r.stdout)
    for name in ("traj", "extxyz", "vasp-xml", "vasp-out", "espresso-out"):
        assert any(name in k for k in names), name


def test_inspect_says_why_group_cells_are_blank():
    """The per-step table leaves the group column blank where spglib was not asked; the caption says
    so and how to fill it, and with --all-frames every cell is filled and the note goes."""
    run = Path(__file__).parent.parent / "example_runs" / "L06_emt_bfgs.traj"
    note = "group column blank where spglib was not asked (--all-frames asks it on every step)"
    some, every = dw("inspect", run), dw("inspect", run, "--all-frames")
    assert some.returncode == every.returncode == 0
    table = [ln for ln in some.stdout.splitlines() if ln.strip()[:1].isdigit()]
    assert any(len(ln.split()) < len(table[0].split()) for ln in table) and note in some.stdout
    assert note not in every.stdout


def test_the_chiral_column_is_the_deformation_the_handedness_rule_judges():
    """One fact, one number: inspect's and follow's "chiral" for a layer is sign x the deformation
    to the nearest lattice with a mirror line, the measure the handedness-flip threshold reads; a
    2D lattice has a mirror line exactly when it is op, oc, tp or hp (International Tables), so it
    equals the smallest of those four columns, with the frame's sign (was the root-space distance,
    which grows like its square root: 0.0702 beside oc 0.142)."""
    path = Path(__file__).parent.parent / "example_runs" / "L10_emt_bfgs_flip.traj"
    out = dw("inspect", path).stdout.splitlines()
    head = out[0].split()
    rows = [ln.split() for ln in out[1:] if ln.strip() and ln.split()[0].isdigit()]
    assert len(rows) == 31
    col = {name: head.index(name) for name in ("op/Å", "oc/Å", "tp/Å", "hp/Å", "sign", "chiral_def/Å")}
    for r in rows:
        nearest = min(float(r[col[t]]) for t in ("op/Å", "oc/Å", "tp/Å", "hp/Å"))
        assert float(r[col["chiral_def/Å"]]) == pytest.approx(int(r[col["sign"]]) * nearest, rel=2e-3)
    follow = dw("follow", path, "--idle", "1").stdout
    assert "step    0  E       3.181602 eV  at mp  nearest oc 0.142, hp 0.344 Å  sign -1  " \
           "chiral_def -0.142 Å" in follow


def test_follow_says_when_a_flag_it_announced_no_longer_holds():
    """A live judgement can name one type while the run goes and another once it has ended: the
    real pw.x vc-relax of tests/data/qe_trials/si2_bfgs_gave_up nears oF while its hR is not yet
    held for the persistence steps, and nears cF once the end counts (hR gained). follow announced
    the first and never withdrew it; every flag it announced and the final record does not hold
    is now said to hold no longer."""
    path = Path(__file__).parent / "data" / "qe_trials" / "si2_bfgs_gave_up"
    out = dw("follow", path, "--idle", "1").stdout
    announced = {w for ln in out.splitlines() if "  new: " in ln
                 for w in ln.split("  new: ", 1)[1].split()}
    withdrawn = {ln.split("no longer holds: ", 1)[1].split()[0] for ln in out.splitlines()
                 if "no longer holds: " in ln}
    renamed = {f"{m.group(1)}({m.group(2)})" for m in
               re.finditer(r"^  (\S+) now names \S+ \(was (\w+);", out, re.M)}
    final = json.loads(dw("inspect", path, "--json").stdout)
    held = {f"{f['code']}({f['type']})" if f["type"] else f["code"] for f in final["flags"]}
    assert "lattice-nearing(oF)" in announced and "lattice-nearing(cF)" in held
    assert withdrawn | renamed == announced - held and "lattice-nearing(oF)" in renamed
    assert "  lattice-nearing now names cF (was oF;" in out


def test_follow_says_a_flag_now_names_another_type_not_that_the_first_no_longer_holds():
    """The team's real pw.x 2Dxy layer (tests/data/qe/layer_oblique_to_hex) gains oc, then hp:
    lattice-gained names the most symmetric type held. Every hexagonal 2D lattice is also centred
    rectangular (International Tables, the 2D lattice types; from memory), and the record's
    deformation to oc stays within its threshold to the end, so "no longer holds:
    lattice-gained(oc)" was false: the flag now names hp."""
    path = Path(__file__).parent / "data" / "qe" / "layer_oblique_to_hex" / "pw.out"
    out = dw("follow", path, "--idle", "1").stdout
    assert "new: lattice-gained(oc)" in out
    assert "no longer holds: lattice-gained" not in out
    assert "  lattice-gained now names hp (was oc; as the run now reads)" in out
    rec = json.loads(dw("inspect", path, "--json").stdout)
    within = rec["config"]["rules"]["lattice"]["within"]
    assert rec["frames"][-1]["deformation"]["oc"] <= within


def test_audit_all_frames_asks_spglib_on_every_frame(tmp_path):
    """`audit --all-frames` (the README's performance table names it) as inspect's option."""
    src = Path(__file__).parent / "data" / "ml_trials" / "hbn_chgnet_vacuum_x.traj"
    p = dw("audit", src, "-o", tmp_path / "out", "--all-frames", "--no-report", "--progress", "off")
    assert p.returncode == 0, p.stderr
    (rec,) = [json.loads(f.read_text()) for f in (tmp_path / "out" / "records").glob("*.json")]
    assert all(f.get("structure") for f in rec["frames"]) and len(rec["frames"]) == 6


def test_audit_of_a_root_that_does_not_exist_is_a_one_line_error(tmp_path):
    """A typo in a root is the command's error (exit 1, one line), not a failed run with a
    report; nothing is written."""
    r = dw("audit", tmp_path / "camapign", "-o", tmp_path / "out")
    assert r.returncode == 1 and r.stdout == ""
    assert r.stderr.strip() == f"driftwatch: error: {tmp_path / 'camapign'}: no such file or folder"
    assert not (tmp_path / "out").exists()
    r = dw("tolerance", "--help")
    assert "exit codes: 0 ok, 1 input/config/output error, 2 usage error,\n141" in r.stdout


def test_a_reader_that_leaves_mid_way_through_a_large_json_record_gives_141():
    """``driftwatch inspect RUN --json | head -c 100`` on a record larger than a pipe holds (the
    bundled B07, a real FIRE run of 86 frames): the reader leaves after 100 bytes; the command
    notices at its next write and stops with 141 (it had exited 0, the rest written into a closed
    pipe, found by a new user's field trial)."""
    import os
    rec = Path(__file__).parent.parent / "example_runs" / "B07_emt_fire_path.traj"
    proc = subprocess.Popen([sys.executable, "-m", "driftwatch", "inspect", str(rec), "--json"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE)
    head = os.read(proc.stdout.fileno(), 100)
    proc.stdout.close()
    err = proc.stderr.read().decode()
    assert head.startswith(b"{") and proc.wait(timeout=300) == 141 and err == ""


def test_bad_numbers_for_options_are_usage_errors_naming_the_option():
    """A negative poll interval had ended in an "internal error" (time.sleep), a negative --idle
    ran, and -j 0 was taken: each is now a usage error (exit 2) naming the option."""
    for args, said in ((["follow", QE / "layer_oblique_to_hex", "--poll", "-1"], "--poll"),
                       (["follow", QE / "layer_oblique_to_hex", "--poll", "0"], "--poll"),
                       (["follow", QE / "layer_oblique_to_hex", "--idle", "-5"], "--idle"),
                       (["audit", QE / "layer_oblique_to_hex", "-j", "0"], "-j/--workers"),
                       (["audit", QE / "layer_oblique_to_hex", "-j", "x"], "-j/--workers")):
        r = dw(*args)
        assert r.returncode == 2 and f"argument {said}:" in r.stderr, (args, r.stderr)
        assert "internal error" not in r.stderr


def test_a_full_standard_output_is_said_as_such():
    """Standard output on a full file system (/dev/full, a batch job's log disk): one line saying
    it was the standard output, exit 1 (it had been an "internal error")."""
    with open("/dev/full", "w") as full:
        r = subprocess.run([sys.executable, "-m", "driftwatch", "inspect",
                            str(QE / "layer_oblique_to_hex")], stdout=full, stderr=subprocess.PIPE,
                           text=True, timeout=300)
    assert r.returncode == 1
    assert r.stderr == "driftwatch: error: standard output: No space left on device\n"


def test_tolerance_names_the_frame_by_step_and_stage():
    """custodian's genuine double relaxation (tests/data/public/custodian_double_relax): the last
    frame is the combined run's frame 5, step 5 of relax2's vasprun.xml: the heading says all
    three (it said "frame 5" only, a number no file of the run shows)."""
    r = dw("tolerance", Path(__file__).parent / "data" / "public" / "custodian_double_relax")
    assert r.returncode == 0, r.stderr
    assert ", frame 5 (step 5, in stage relax2: vasprun.xml.relax2.gz): space group" in \
        r.stdout.splitlines()[0]
