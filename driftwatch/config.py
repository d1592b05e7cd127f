"""Configuration: YAML (safe-loaded), validated against the default, with units on every threshold.

A config file is a partial tree over ``configs/default.yaml``; ``extends: NAME`` starts from a preset
(``default``, ``monolayer``, ``bulk``, ``tolerance``) or from another file. Quantities with a dimension
are strings with a unit (``"1e-3 Å"``, ``"5 deg"``); they are converted to Å and degrees on load.
Unknown keys, wrong types, missing units and values out of range (:data:`RANGES`) raise
:class:`ConfigError` naming the key. YAML anchors and aliases (``&name``, ``*name``) are refused: a
config has no use for them, and nested aliases expand exponentially (a few hundred bytes can stand
for gigabytes). A config file may hold at most :data:`MAX_BYTES`.

Environment: ``DRIFTWATCH_CONFIG`` names the config used when none is given.
"""

from __future__ import annotations

import copy
import math
import reprlib
import os
import re
import stat
from pathlib import Path

import yaml

from .errors import ConfigError

__all__ = ["load", "coerce", "preset_path", "PRESETS", "parse_length", "parse_angle", "fingerprint",
           "RANGES", "MAX_BYTES"]

CONFIG_DIR = Path(__file__).resolve().parent / "configs"
PRESETS = ("default", "monolayer", "bulk", "tolerance", "screen", "large")

BOHR = 0.529177210903  # Å (CODATA 2018)
_LENGTH_UNITS = {"å": 1.0, "a": 1.0, "ang": 1.0, "angstrom": 1.0, "nm": 10.0, "pm": 0.01, "bohr": BOHR}
_ANGLE_UNITS = {"deg": 1.0, "degree": 1.0, "degrees": 1.0, "°": 1.0, "rad": 57.29577951308232}
_QUANTITY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([^\s\d].*?)\s*$")

# Kind of each leaf: "length" (Å), "angle" (deg), "fraction", "int", "bool", "str", "choice", "list".
SCHEMA = "driftwatch/config-1"
"""The ``schema`` every config states (presets and user files inheriting from them)."""

_KINDS = {
    "schema": "str",
    "geometry.vacuum_gap": "length",
    "geometry.require_layer": "bool",
    "lattice.metric": ("choice", ("l2", "linf")),
    "symmetry.symprec_min": "length",
    "symmetry.symprec_max": "length",
    "symmetry.grid_points": "int",
    "symmetry.angle_tolerance": "angle",
    "symmetry.bisect": "bool",
    "symmetry.precision": "fraction",
    "selection.every": "int",
    "selection.on_change": "length",
    "selection.all_frames": "bool",
    "rules.lattice.within": "length",
    "rules.lattice.start_away": "length",
    "rules.lattice.left_beyond": "length",
    "rules.lattice.nearing_fraction": "fraction",
    "rules.lattice.nearing_within": "length",
    "rules.structure.symprec": "length",
    "rules.persistence.steps": "int",
    "rules.handedness_flip.min_chiral": "length",
    "rules.symprec_dependent.low": "length",
    "rules.symprec_dependent.high": "length",
    "rules.loose_symprec.symprec": "length",
    "rules.loose_symprec.far": "length",
    "rules.atoms_break_lattice.within": "length",
    "rules.atoms_break_lattice.symprec": "length",
    "rules.held_by_code.enabled": "bool",
    "tolerance.min_plateau": "fraction",
    "report.common_symprecs": ("list", "length"),
    "record.structures": ("choice", ("final", "all", "none")),
    "reject_on": ("list", "str"),
    "inputs.structure_keys": ("list", "str"),
}

# Keys of driftwatch/config-1 files before the verdict model had a direction (old name -> new).
_RENAMED = {
    "rules.snapped": "rules.lattice", "rules.snapped.within": "rules.lattice.within",
    "rules.snapped.start_away": "rules.lattice.start_away",
    "rules.approaching": "rules.lattice", "rules.approaching.fraction": "rules.lattice.nearing_fraction",
    "rules.approaching.start_away": "rules.lattice.start_away",
    "rules.tolerance_sensitive": "rules.symprec_dependent",
    "rules.spglib_overcall": "rules.loose_symprec", "rules.atoms_settled": "rules.structure",
    "rules.code_imposed": "rules.held_by_code", "fail_on": "reject_on",
}


_INF = math.inf
RANGES = {
    # key: (low, high, low included, high included); lengths in Å, angles in degrees
    "geometry.vacuum_gap": (0.0, _INF, False, False),
    "symmetry.symprec_min": (0.0, 1.0, False, True),
    "symmetry.symprec_max": (0.0, 1.0, False, True),
    "symmetry.grid_points": (2, 200, True, True),
    "symmetry.angle_tolerance": (0.0, 30.0, False, True),      # or exactly -1: spglib's default
    "symmetry.precision": (1.0, 2.0, False, True),
    "selection.on_change": (0.0, _INF, True, False),
    "rules.lattice.within": (0.0, _INF, False, False),
    "rules.lattice.start_away": (0.0, _INF, True, False),
    "rules.lattice.left_beyond": (0.0, _INF, False, False),
    "rules.lattice.nearing_fraction": (0.0, 1.0, False, True),
    "rules.lattice.nearing_within": (0.0, _INF, False, False),
    "rules.structure.symprec": (0.0, 1.0, False, True),
    "rules.persistence.steps": (1, 100_000, True, True),
    "rules.handedness_flip.min_chiral": (0.0, _INF, True, False),
    "rules.symprec_dependent.low": (0.0, 1.0, False, True),
    "rules.symprec_dependent.high": (0.0, 1.0, False, True),
    "rules.loose_symprec.symprec": (0.0, 1.0, False, True),
    "rules.loose_symprec.far": (0.0, _INF, True, False),
    "rules.atoms_break_lattice.within": (0.0, _INF, False, False),
    "rules.atoms_break_lattice.symprec": (0.0, 1.0, False, True),
    "tolerance.min_plateau": (1.0, _INF, True, False),
    "report.common_symprecs": (0.0, 1.0, False, True),
}
"""Allowed value of each numeric key. symprec values above 1 Å are meaningless for interatomic
distances of 1-3 Å and make spglib slow (one call at 0.5 Å: ~1 s on a rattled 192-atom cell);
angle tolerances above 30 deg would call clearly distorted cells symmetric; more than 200 grid
points multiply spglib's cost without a gain (bisection locates breakpoints); thresholds are
positive (a negative one silently disables its flag). Every value must be finite."""
MAX_BYTES = 1_000_000
"""The largest config file read (bytes)."""


def _unit_of(kind) -> str:
    return {"length": " Å", "angle": " deg"}.get(kind, "")


def _check_range(key: str, kind, value) -> None:
    base = key.split("[", 1)[0]
    if isinstance(value, float) and not math.isfinite(value):
        raise ConfigError(f"{key}: must be a finite number, got {value}")
    if base not in RANGES:
        return
    if base == "symmetry.angle_tolerance" and value == -1.0:
        return
    lo, hi, lo_in, hi_in = RANGES[base]
    ok = (value >= lo if lo_in else value > lo) and (value <= hi if hi_in else value < hi)
    if not ok:
        u = _unit_of(kind)
        low = f"at least {lo:g}{u}" if lo_in else f"more than {lo:g}{u}"
        span = low if hi == _INF else \
            f"{low} and {'at most' if hi_in else 'below'} {hi:g}{u}"
        extra = " (or -1 deg for spglib's default)" if base == "symmetry.angle_tolerance" else ""
        raise ConfigError(f"{key}: must be {span}{extra}, got {value:g}{u}")


def _parse_quantity(text, units: dict, key: str, what: str) -> float:
    if isinstance(text, bool) or not isinstance(text, (str, int, float)):
        raise ConfigError(f"{key}: expected a {what} with a unit (e.g. '1e-3 Å'), "
                          f"got {_short(text)}")
    bare = not isinstance(text, str)
    if not bare:       # YAML reads 1e-3 (no dot) as text: a bare number all the same
        try:
            float(text)
            bare = True
        except ValueError:
            pass
    if bare:
        shown = "Å" if units is _LENGTH_UNITS else "deg"
        raise ConfigError(f"{key}: missing unit: write '{str(text).strip()} {shown}' "
                          f"(units: {', '.join(units)})")
    m = _QUANTITY.match(text)
    if not m:
        raise ConfigError(f"{key}: cannot read {_short(text)} as a {what} with a unit "
                          f"(e.g. '1e-3 Å')")
    unit = m.group(2).lower()
    if unit not in units:
        raise ConfigError(f"{key}: unknown {what} unit {m.group(2)!r} (use one of {', '.join(units)})")
    return float(m.group(1)) * units[unit]


def parse_length(text, key="length") -> float:
    """'1e-3 Å' -> 0.001 (Å). Bare numbers are rejected: the unit is required."""
    return _parse_quantity(text, _LENGTH_UNITS, key, "length")


def parse_angle(text, key="angle") -> float:
    """'5 deg' -> 5.0 (degrees); '-1 deg' is spglib's 'use the default'."""
    return _parse_quantity(text, _ANGLE_UNITS, key, "angle")


def _convert(key, kind, value):
    if isinstance(kind, tuple) and kind[0] == "choice":
        if value not in kind[1]:
            raise ConfigError(f"{key}: must be one of {', '.join(kind[1])}, got {_short(value)}")
        return value
    if isinstance(kind, tuple) and kind[0] == "list":
        if not isinstance(value, list):
            raise ConfigError(f"{key}: expected a list, got {type(value).__name__}")
        return [_convert(f"{key}[{i}]", kind[1], v) for i, v in enumerate(value)]
    if kind == "length":
        out = parse_length(value, key)
        _check_range(key, kind, out)
        return out
    if kind == "angle":
        out = parse_angle(value, key)
        _check_range(key, kind, out)
        return out
    if kind == "bool":
        if not isinstance(value, bool):
            raise ConfigError(f"{key}: expected true or false, got {_short(value)}")
        return value
    if kind == "int":
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise ConfigError(f"{key}: expected a whole number >= 0, got {_short(value)}")
        _check_range(key, kind, value)
        return value
    if kind == "fraction":
        if isinstance(value, bool) or not isinstance(value, (int, float)) or value <= 0:
            raise ConfigError(f"{key}: expected a positive number (no unit), got {_short(value)}")
        _check_range(key, kind, float(value))
        return float(value)
    if not isinstance(value, str):
        raise ConfigError(f"{key}: expected text, got {_short(value)}")
    return value


class _Refused(yaml.YAMLError):
    def __init__(self, what: str, mark):
        super().__init__(what)
        self.what, self.mark = what, mark


class _PlainLoader(yaml.SafeLoader):
    """PyYAML's safe loader, refusing anchors and aliases as soon as the composer meets one (before
    anything is expanded or built), and a key given twice in one mapping."""

    def compose_node(self, parent, index):
        event = self.peek_event()
        if isinstance(event, yaml.AliasEvent):
            raise _Refused(f"an alias (*{event.anchor})", event.start_mark)
        if getattr(event, "anchor", None) is not None:
            raise _Refused(f"an anchor (&{event.anchor})", event.start_mark)
        return super().compose_node(parent, index)

    def construct_mapping(self, node, deep=False):
        seen = set()
        for key_node, _ in node.value:          # a key given twice: YAML keeps the last silently
            key = self.construct_object(key_node, deep=True)
            if key in seen:
                raise _Refused(f"the key {key!r} twice", key_node.start_mark)
            seen.add(key)
        return super().construct_mapping(node, deep=deep)


def _short(value, limit: int = 60) -> str:
    """``repr`` of a config value cut to ``limit`` characters (never a huge structure)."""
    r = reprlib.Repr()
    r.maxlevel, r.maxlist, r.maxdict, r.maxstring, r.maxother = 2, 4, 4, limit, limit
    text = r.repr(value)
    return text if len(text) <= limit else text[:limit - 3] + "..."


def _read_yaml(path: Path) -> dict:
    try:
        if not stat.S_ISREG(os.stat(path).st_mode):
            raise ConfigError(f"{path}: not a regular file (a config must be a YAML file)")
        if os.path.getsize(path) > MAX_BYTES:
            raise ConfigError(f"{path}: larger than {MAX_BYTES:,} bytes: not a config")
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        bare = not path.exists() and path.parent == Path(".") and not path.suffix
        raise ConfigError(f"{path}: cannot read config ({exc.strerror or exc})"
                          + (f"; a preset is one of {', '.join(PRESETS)}" if bare else "")) \
            from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: config is not UTF-8 text") from exc
    loader = _PlainLoader(text)
    try:
        data = loader.get_single_data()
    except _Refused as exc:
        if exc.what.startswith("the key"):
            raise ConfigError(f"{path}: {exc.what[:60]} in one mapping (line "
                              f"{exc.mark.line + 1}); give each key once") from None
        raise ConfigError(f"{path}: YAML anchors and aliases are not allowed in a config (found "
                          f"{exc.what[:40]} at line {exc.mark.line + 1}); write each value out"
                          ) from None
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}" if mark else ""
        raise ConfigError(f"{path}: invalid YAML{where}") from exc
    finally:
        loader.dispose()
    if data is None:
        return {}
    if not isinstance(data, dict):
        raise ConfigError(f"{path}: a config must be a mapping of sections, got {type(data).__name__}")
    return data


def preset_path(name: str) -> Path:
    """Path of a bundled preset (``default``, ``monolayer``, ``bulk``, ``tolerance``)."""
    if name not in PRESETS:
        raise ConfigError(f"unknown preset {name!r} (presets: {', '.join(PRESETS)})")
    return CONFIG_DIR / f"{name}.yaml"


def _resolve(source, seen=(), origins=None) -> dict:
    """Raw (unconverted) tree of a preset name, file path or mapping, with ``extends`` applied.
    ``origins`` (dotted key -> file) is filled with where each value came from."""
    if isinstance(source, dict):
        raw, origin = copy.deepcopy(source), "<mapping>"
    else:
        path = preset_path(source) if str(source) in PRESETS else Path(source)
        origin = str(path)
        if origin in seen:
            raise ConfigError(f"{origin}: 'extends' loops back to itself")
        raw = _read_yaml(path)
        seen = (*seen, origin)
    parent = raw.pop("extends", None)
    if parent is None and origin != str(preset_path("default")):
        parent = "default"
    base = _resolve(parent, seen, origins) if parent is not None else {}
    return _merge(base, raw, origin, origins=origins)


def _merge(base: dict, over: dict, origin: str, prefix: str = "", origins=None) -> dict:
    out = copy.deepcopy(base)
    for key, value in over.items():
        full = f"{prefix}{key}"
        if not isinstance(key, str):
            raise ConfigError(f"{origin}: key {_short(key)} is not text")
        section = any(k.startswith(full + ".") for k in _KINDS)
        if section and not isinstance(value, dict):
            got = "empty" if value is None else f"a {type(value).__name__}"
            raise ConfigError(f"{origin}: {_short(full)} is a section (a mapping of keys), not "
                              f"{got}")
        if isinstance(value, dict):
            if full in _RENAMED:
                raise ConfigError(f"{origin}: {full!r} was renamed: use {_RENAMED[full]!r}")
            if not any(k.startswith(full + ".") for k in _KINDS):
                raise ConfigError(f"{origin}: unknown key {_short(full)}")
            out[key] = _merge(out.get(key, {}) if isinstance(out.get(key), dict) else {},
                              value, origin, full + ".", origins)
        else:
            if full in _RENAMED:
                raise ConfigError(f"{origin}: {full!r} was renamed: use {_RENAMED[full]!r}")
            if full not in _KINDS:
                hint = [k for k in _KINDS if k.rsplit(".", 1)[-1] == key]
                extra = f" (did you mean {hint[0]!r}?)" if hint else ""
                raise ConfigError(f"{origin}: unknown key {_short(full)}{extra}")
            out[key] = value
            if origins is not None:
                origins[full] = origin
    return out


def _flatten(tree: dict, prefix=""):
    for key, value in tree.items():
        if isinstance(value, dict):
            yield from _flatten(value, f"{prefix}{key}.")
        else:
            yield f"{prefix}{key}", value


def _set(tree: dict, dotted: str, value):
    *parents, leaf = dotted.split(".")
    for p in parents:
        tree = tree.setdefault(p, {})
    tree[leaf] = value


def load(source=None, overrides: dict | None = None) -> dict:
    """Load and validate a config.

    Args:
        source: preset name, path of a YAML file, a mapping, or None (``$DRIFTWATCH_CONFIG`` or default).
        overrides: dotted keys to raw values, e.g. ``{"selection.all_frames": True}``.

    Returns:
        A nested dict with lengths in Å and angles in degrees (plain floats).
    """
    if source is None:
        source = os.environ.get("DRIFTWATCH_CONFIG") or "default"
    origins: dict = {}
    raw = _resolve(source, origins=origins)
    for dotted, value in (overrides or {}).items():
        if dotted not in _KINDS:
            raise ConfigError(f"override: unknown key {dotted!r}")
        _set(raw, dotted, value)
        origins[dotted] = "override"
    out: dict = {}
    raw.pop("_effective", None)
    raw.pop("_reject_on_from", None)      # a loaded config given again
    for dotted, value in _flatten(raw):
        try:
            _set(out, dotted, _convert(dotted, _KINDS[dotted], value))
        except ConfigError as exc:
            where = origins.get(dotted)
            raise (ConfigError(f"{where}: {exc}") if where else exc) from None
    missing = [k for k in _KINDS if k not in dict(_flatten(out))]
    if missing:
        raise ConfigError(f"config lacks {', '.join(missing)}")
    try:
        _check_consistency(out)
    except ConfigError as exc:             # name the file that set the first key the check names
        named = [k for k in _KINDS if k in str(exc) and origins.get(k) not in (None, "override")]
        where = origins.get(named[0]) if named else None
        raise (ConfigError(f"{where}: {exc}") if where and not str(where).isidentifier()
               else exc) from None
    if out.get("schema") != SCHEMA:
        raise ConfigError(f"{origins.get('schema', 'config')}: schema {out.get('schema')!r} is "
                          f"not {SCHEMA!r} (a config of another tool or version)")
    out["_reject_on_from"] = origins.get("reject_on", "config")
    out["_effective"] = True
    return out


def coerce(config) -> dict:
    """An already loaded config passes through; anything else goes through :func:`load`."""
    if isinstance(config, dict) and config.get("_effective") is True:
        return config
    return load(config)


def _check_consistency(cfg: dict) -> None:
    sym = cfg["symmetry"]
    if not 0 < sym["symprec_min"] < sym["symprec_max"]:
        raise ConfigError("symmetry.symprec_min must be > 0 and below symmetry.symprec_max")
    if sym["grid_points"] < 2:
        raise ConfigError("symmetry.grid_points must be at least 2")
    if sym["precision"] <= 1.0:
        raise ConfigError("symmetry.precision is a ratio high/low and must be > 1")
    r = cfg["rules"]
    ts = r["symprec_dependent"]
    if not 0 < ts["low"] < ts["high"]:
        raise ConfigError("rules.symprec_dependent.low must be > 0 and below .high")
    lat = r["lattice"]
    if not 0 < lat["within"] <= lat["left_beyond"]:
        raise ConfigError("rules.lattice.within must be > 0 and at most rules.lattice.left_beyond "
                          "(a lost type must end at least as far away as a held one may be)")
    if not lat["within"] < lat["start_away"]:
        raise ConfigError("rules.lattice.start_away must be above rules.lattice.within")
    if not 0 < lat["nearing_fraction"] <= 1:
        raise ConfigError("rules.lattice.nearing_fraction must be in (0, 1]")
    if r["persistence"]["steps"] < 1:
        raise ConfigError("rules.persistence.steps must be at least 1")
    if cfg["tolerance"]["min_plateau"] < 1:
        raise ConfigError("tolerance.min_plateau is a factor in symprec and must be >= 1")

def fingerprint(cfg: dict) -> str:
    """Stable hash of an effective (converted) config, for cache keys."""
    import hashlib
    import json
    kept = {k: v for k, v in cfg.items() if k != "_reject_on_from"}    # where, not what
    return hashlib.sha256(json.dumps(kept, sort_keys=True).encode()).hexdigest()[:16]
