"""Configuration: YAML (safe-loaded), validated against the default, with units on every threshold.

A config file is a partial tree over ``configs/default.yaml``; ``extends: NAME`` starts from a preset
(``default``, ``monolayer``, ``bulk``, ``tolerance``) or from another file. Quantities with a dimension
are strings with a unit (``"1e-3 Å"``, ``"5 deg"``); they are converted to Å and degrees on load.
Unknown keys, wrong types and missing units raise :class:`ConfigError` naming the key.

Environment: ``DRIFTWATCH_CONFIG`` names the config used when none is given.
"""

from __future__ import annotations

import copy
import os
import re
from pathlib import Path

import yaml

from .errors import ConfigError

__all__ = ["load", "coerce", "preset_path", "PRESETS", "parse_length", "parse_angle", "fingerprint"]

CONFIG_DIR = Path(__file__).resolve().parent / "configs"
PRESETS = ("default", "monolayer", "bulk", "tolerance", "screen")

BOHR = 0.529177210903  # Å (CODATA 2018)
_LENGTH_UNITS = {"å": 1.0, "a": 1.0, "ang": 1.0, "angstrom": 1.0, "nm": 10.0, "pm": 0.01, "bohr": BOHR}
_ANGLE_UNITS = {"deg": 1.0, "degree": 1.0, "degrees": 1.0, "°": 1.0, "rad": 57.29577951308232}
_QUANTITY = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([^\s\d].*?)\s*$")

# Kind of each leaf: "length" (Å), "angle" (deg), "fraction", "int", "bool", "str", "choice", "list".
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


def _parse_quantity(text, units: dict, key: str, what: str) -> float:
    if isinstance(text, bool) or not isinstance(text, (str, int, float)):
        raise ConfigError(f"{key}: expected a {what} with a unit (e.g. '1e-3 Å'), got {text!r}")
    if not isinstance(text, str):
        shown = "Å" if units is _LENGTH_UNITS else "deg"
        raise ConfigError(f"{key}: missing unit: write '{text} {shown}' (units: {', '.join(units)})")
    m = _QUANTITY.match(text)
    if not m:
        raise ConfigError(f"{key}: cannot read {text!r} as a {what} with a unit (e.g. '1e-3 Å')")
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
            raise ConfigError(f"{key}: must be one of {', '.join(kind[1])}, got {value!r}")
        return value
    if isinstance(kind, tuple) and kind[0] == "list":
        if not isinstance(value, list):
            raise ConfigError(f"{key}: expected a list, got {type(value).__name__}")
        return [_convert(f"{key}[{i}]", kind[1], v) for i, v in enumerate(value)]
    if kind == "length":
        return parse_length(value, key)
    if kind == "angle":
        return parse_angle(value, key)
    if kind == "bool":
        if not isinstance(value, bool):
            raise ConfigError(f"{key}: expected true or false, got {value!r}")
        return value
    if kind == "int":
        if isinstance(value, bool) or not isinstance(value, int) or value < 0:
            raise ConfigError(f"{key}: expected a whole number >= 0, got {value!r}")
        return value
    if kind == "fraction":
        if isinstance(value, bool) or not isinstance(value, (int, float)) or value <= 0:
            raise ConfigError(f"{key}: expected a positive number (no unit), got {value!r}")
        return float(value)
    if not isinstance(value, str):
        raise ConfigError(f"{key}: expected text, got {value!r}")
    return value


def _read_yaml(path: Path) -> dict:
    try:
        text = path.read_text(encoding="utf-8")
    except OSError as exc:
        raise ConfigError(f"{path}: cannot read config ({exc.strerror or exc})") from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(f"{path}: config is not UTF-8 text") from exc
    try:
        data = yaml.safe_load(text)
    except yaml.YAMLError as exc:
        mark = getattr(exc, "problem_mark", None)
        where = f" at line {mark.line + 1}" if mark else ""
        raise ConfigError(f"{path}: invalid YAML{where}") from exc
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
            raise ConfigError(f"{origin}: key {key!r} is not text")
        if isinstance(value, dict):
            if full in _RENAMED:
                raise ConfigError(f"{origin}: {full!r} was renamed: use {_RENAMED[full]!r}")
            if not any(k.startswith(full + ".") for k in _KINDS):
                raise ConfigError(f"{origin}: unknown key {full!r}")
            out[key] = _merge(out.get(key, {}) if isinstance(out.get(key), dict) else {},
                              value, origin, full + ".", origins)
        else:
            if full in _RENAMED:
                raise ConfigError(f"{origin}: {full!r} was renamed: use {_RENAMED[full]!r}")
            if full not in _KINDS:
                hint = [k for k in _KINDS if k.rsplit(".", 1)[-1] == key]
                extra = f" (did you mean {hint[0]!r}?)" if hint else ""
                raise ConfigError(f"{origin}: unknown key {full!r}{extra}")
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
    for dotted, value in _flatten(raw):
        try:
            _set(out, dotted, _convert(dotted, _KINDS[dotted], value))
        except ConfigError as exc:
            where = origins.get(dotted)
            raise (ConfigError(f"{where}: {exc}") if where else exc) from None
    missing = [k for k in _KINDS if k not in dict(_flatten(out))]
    if missing:
        raise ConfigError(f"config lacks {', '.join(missing)}")
    _check_consistency(out)
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
    return hashlib.sha256(json.dumps(cfg, sort_keys=True).encode()).hexdigest()[:16]
