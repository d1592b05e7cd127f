"""Config loading: presets, units, validation messages naming the key."""

import pytest

from driftwatch import config
from driftwatch.errors import ConfigError


@pytest.mark.parametrize("name", config.PRESETS)
def test_presets_load_and_carry_units(name):
    cfg = config.load(name)
    # lengths come back in Å as floats; the default grid spans 1e-5..0.3 Å (our choice, bench/README.md)
    assert cfg["symmetry"]["symprec_min"] == pytest.approx(1e-5)
    assert cfg["symmetry"]["symprec_max"] == pytest.approx(0.1 if name == "large" else 0.3)
    assert isinstance(cfg["geometry"]["vacuum_gap"], float)


def test_presets_differ_where_documented():
    assert config.load("monolayer")["geometry"]["require_layer"] is True
    assert config.load("tolerance")["selection"]["all_frames"] is True
    # presets choose thresholds, never which flags fail a command (reject_on stays the user's choice)
    assert config.load("bulk")["rules"]["lattice"]["within"] > config.load("default")["rules"][
        "lattice"]["within"]
    assert all(config.load(p)["reject_on"] == [] for p in config.PRESETS)
    screen = config.load("screen")
    assert screen["symmetry"]["bisect"] is False and screen["selection"]["every"] == 0
    assert screen["symmetry"]["grid_points"] < config.load("default")["symmetry"]["grid_points"]
    # large cells: fewer spglib questions, none above 0.1 Å, the verdicts' symprecs on its grid
    from driftwatch.track import symprec_grid
    large = config.load("large")
    grid = symprec_grid(large)
    assert len(grid) == 7 and max(grid) == pytest.approx(0.1) and large["symmetry"]["bisect"] is False
    assert all(any(abs(g / s - 1) < 1e-6 for g in grid)
               for s in large["report"]["common_symprecs"] + [large["rules"]["structure"]["symprec"]])


@pytest.mark.parametrize("text,value", [
    ("1e-3 Å", 1e-3), ("0.1 A", 0.1), ("2 nm", 20.0), ("50 pm", 0.5),
    ("1 bohr", 0.529177210903),  # CODATA 2018 Bohr radius in Å
    ("1.0e-2 angstrom", 1e-2)])
def test_length_units(text, value):
    assert config.parse_length(text) == pytest.approx(value)


@pytest.mark.parametrize("tree,needle", [
    ({"geometry": {"vacuum_gap": 6}}, "geometry.vacuum_gap: missing unit"),
    ({"geometry": {"vaccum_gap": "6 Å"}}, "unknown key 'geometry.vaccum_gap'"),
    ({"selection": {"every": "often"}}, "selection.every"),
    ({"symmetry": {"symprec_min": "1e-5 furlong"}}, "unknown length unit 'furlong'"),
    ({"lattice": {"metric": "l3"}}, "lattice.metric: must be one of l2, linf"),
    ({"selection": {"all_frames": "yes"}}, "selection.all_frames: expected true or false"),
    ({"symmetry": {"symprec_min": "1 Å", "symprec_max": "0.5 Å"}}, "symprec_min must be"),
    ({"rules": {"lattice": {"nearing_fraction": "0.5 Å"}}}, "rules.lattice.nearing_fraction"),
    ({"gap": "6 Å"}, "unknown key 'gap'"),
])
def test_bad_configs_name_the_key(tree, needle):
    with pytest.raises(ConfigError, match=None) as err:
        config.load(tree)
    assert needle in str(err.value)


def test_yaml_file_errors(tmp_path):
    bad = tmp_path / "bad.yaml"
    bad.write_text("geometry: [unclosed\n")
    with pytest.raises(ConfigError, match="invalid YAML at line"):
        config.load(bad)
    notmap = tmp_path / "list.yaml"
    notmap.write_text("- 1\n- 2\n")
    with pytest.raises(ConfigError, match="must be a mapping"):
        config.load(notmap)
    with pytest.raises(ConfigError, match="cannot read config") as err:
        config.load(tmp_path / "missing.yaml")
    assert "preset" not in str(err.value)
    with pytest.raises(ConfigError, match="a preset is one of default, monolayer, bulk"):
        config.load("bulkk")                     # a mistyped preset name: the presets are named


def test_yaml_is_safe_loaded(tmp_path):
    # yaml.safe_load refuses python object tags (PyYAML documentation): nothing is executed
    evil = tmp_path / "evil.yaml"
    evil.write_text("geometry: !!python/object/apply:os.system ['echo pwned']\n")
    with pytest.raises(ConfigError, match="invalid YAML"):
        config.load(evil)


def test_extends_file_chain_and_overrides(tmp_path):
    base = tmp_path / "base.yaml"
    base.write_text("extends: monolayer\nselection:\n  every: 3\n")
    child = tmp_path / "child.yaml"
    child.write_text(f"extends: {base}\nrules:\n  lattice:\n    within: 2e-3 Å\n")
    cfg = config.load(child, overrides={"selection.all_frames": True})
    assert cfg["geometry"]["require_layer"] is True
    assert cfg["selection"]["every"] == 3
    assert cfg["rules"]["lattice"]["within"] == pytest.approx(2e-3)
    assert cfg["selection"]["all_frames"] is True
    loop = tmp_path / "loop.yaml"
    loop.write_text(f"extends: {loop}\n")
    with pytest.raises(ConfigError, match="loops back"):
        config.load(loop)


def test_coerce_and_fingerprint():
    cfg = config.load()
    assert config.coerce(cfg) is cfg
    assert config.fingerprint(cfg) == config.fingerprint(config.load("default"))
    assert config.fingerprint(cfg) != config.fingerprint(config.load("bulk"))


def test_config_errors_name_the_file_and_the_problem(tmp_path):
    """A section given as a list or left empty, a schema of another tool, crossed limits and an
    unknown reject_on code: one line naming the file."""
    from driftwatch import config
    from driftwatch.errors import ConfigError
    cases = {"rules: [1, 2]\n": "'rules' is a section (a mapping of keys), not a list",
             "symmetry:\n": "'symmetry' is a section (a mapping of keys), not empty",
             "schema: something-else\n": "schema 'something-else' is not 'driftwatch/config-1'",
             "symmetry: {symprec_min: 0.5 Å, symprec_max: 0.1 Å}\n":
                 "symmetry.symprec_min must be > 0 and below symmetry.symprec_max"}
    for text, said in cases.items():
        f = tmp_path / "c.yaml"
        f.write_text(text)
        with pytest.raises(ConfigError) as err:
            config.load(str(f))
        assert str(err.value).startswith(f"{f}: ") and said in str(err.value), str(err.value)
    f.write_text("reject_on: [lattice-gaind]\n")
    cfg = config.load(str(f))
    assert cfg["_reject_on_from"] == str(f)
    assert config.fingerprint(cfg) == config.fingerprint(config.load({"reject_on":
                                                                      ["lattice-gaind"]}))


def test_a_key_given_twice_is_refused(tmp_path):
    """YAML keeps the last of two equal keys without a word; a config says which line."""
    from driftwatch import config
    from driftwatch.errors import ConfigError
    f = tmp_path / "c.yaml"
    f.write_text("rules:\n  lattice:\n    within: 1e-3 Å\n    within: 2e-3 Å\n")
    with pytest.raises(ConfigError, match=r"the key 'within' twice in one mapping \(line 4\)"):
        config.load(str(f))


def test_the_large_preset_gives_the_defaults_verdicts_and_flags():
    """`large` asks spglib fewer questions (no grid point above 0.1 Å, no bisection), and claims
    the same verdicts at the common symprecs, the same step of a group change and the same
    lattice flags as the default: checked on the 17 example runs (real pw.x and EMT relaxations,
    whose default verdicts are checked against spglib in test_public_runs/test_verdict), whose
    tolerance flags come out the same too (a coarser spectrum can miss one elsewhere: 1 run of
    788 in a review)."""
    from pathlib import Path

    from driftwatch.track import analyze
    runs = sorted(p for p in (Path(__file__).parent.parent / "example_runs").iterdir()
                  if p.name[:1] in "BL")
    assert len(runs) == 17
    for run in runs:
        a, b = analyze(run, "default"), analyze(run, "large")
        va, vb = a["summary"]["verdict"], b["summary"]["verdict"]
        assert va["direction"] == vb["direction"], run     # (the text's brackets: coarser)
        assert va["structure"]["at"] == vb["structure"]["at"], run
        assert va["structure"].get("from_step") == vb["structure"].get("from_step"), run
        flags = [sorted((f["code"], f.get("type"), f["step"]) for f in r["flags"]) for r in (a, b)]
        assert flags[0] == flags[1], run
        asked = [max(s for f in r["frames"] if f.get("symmetry") for s in f["symmetry"]["symprec"])
                 for r in (a, b)]
        assert asked[0] == pytest.approx(0.3) and asked[1] == pytest.approx(0.1)
