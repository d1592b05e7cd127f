"""Fixed styles of every plot: one colour, marker and dash pattern per Bravais type and per group number.

The hue says the crystal system everywhere (the same family for a Bravais type, its lattice system and
every space or layer group of that system); within a system the marker and the dash pattern say the
centring. Styles come from these tables only, never from the order in which series appear, so a type or
a group has the same look in every plot of every page and notebook.

Crystal systems of space-group numbers: International Tables for Crystallography A, table 2.1.2.1
(triclinic 1-2, monoclinic 3-15, orthorhombic 16-74, tetragonal 75-142, trigonal 143-167, hexagonal
168-194, cubic 195-230); of layer-group numbers: International Tables E (triclinic 1-2, monoclinic 3-18,
orthorhombic 19-48, tetragonal 49-64, trigonal 65-72, hexagonal 73-80).
"""

from __future__ import annotations

__all__ = ["SYSTEM_SHADES", "TYPE_STYLE", "SYSTEM_OF_TYPE", "VERDICT_COLOURS", "FAILED_COLOUR",
           "type_style", "system_style", "group_colour", "group_system", "CELL_STYLE", "VIRIDIS",
           "viridis"]

# Five colours per crystal system (shades and neighbouring hues; neighbouring numbers differ).
SYSTEM_SHADES = {
    "triclinic": ("#3a3a3a", "#777777", "#a0a0a0", "#5a5a5a", "#8c8c8c"),
    "monoclinic": ("#08306b", "#2171b5", "#6baed6", "#3f4fa8", "#17a2c4"),
    "orthorhombic": ("#b8860b", "#e6550d", "#f0a04b", "#7f2704", "#c77c48"),
    "tetragonal": ("#00441b", "#238b45", "#74c476", "#1b9e77", "#66a61e"),
    "trigonal": ("#7a0177", "#c51b8a", "#f768a1", "#ae017e", "#e7298a"),
    "hexagonal": ("#3f007d", "#6a51a3", "#9e9ac8", "#54278f", "#8c6bb1"),
    "cubic": ("#99000d", "#cb181d", "#fb6a4a", "#67000d", "#e34a33"),
}
FAILED_COLOUR = "#dddddd"

# centring -> (marker, dash); markers are matplotlib's codes, dashes (on, off, ...) in points
_CENTRING = {"P": ("o", None), "S": ("^", (5, 2)), "I": ("v", (2, 2)), "F": ("D", (6, 2, 1, 2)),
             "R": ("p", (4, 1.5, 1, 1.5))}

SYSTEM_OF_TYPE = {
    "aP": "triclinic", "mP": "monoclinic", "mS": "monoclinic", "oP": "orthorhombic",
    "oS": "orthorhombic", "oI": "orthorhombic", "oF": "orthorhombic", "tP": "tetragonal",
    "tI": "tetragonal", "hR": "trigonal", "hP": "hexagonal", "cP": "cubic", "cI": "cubic",
    "cF": "cubic",
    # 2D Bravais types (International Tables A, 2D lattices): oblique, rectangular (p, c), square,
    # hexagonal; drawn in the hue of the 3D system they share a holohedry family with
    "mp": "triclinic", "op": "orthorhombic", "oc": "orthorhombic", "tp": "tetragonal",
    "hp": "hexagonal",
}


def _style3d(t):
    fam = SYSTEM_SHADES[SYSTEM_OF_TYPE[t]]
    shade = {"P": 1, "S": 0, "I": 3, "F": 4, "R": 1}[t[1]]
    marker, dash = _CENTRING[t[1]]
    return {"colour": fam[shade], "marker": marker, "dash": dash}


TYPE_STYLE = {t: _style3d(t) for t in ("aP", "mP", "mS", "oP", "oS", "oI", "oF", "tP", "tI", "hR",
                                        "hP", "cP", "cI", "cF")}
TYPE_STYLE.update({
    "mp": {"colour": SYSTEM_SHADES["triclinic"][1], "marker": "o", "dash": None},
    "op": {"colour": SYSTEM_SHADES["orthorhombic"][1], "marker": "o", "dash": None},
    "oc": {"colour": SYSTEM_SHADES["orthorhombic"][0], "marker": "^", "dash": (5, 2)},
    "tp": {"colour": SYSTEM_SHADES["tetragonal"][1], "marker": "s", "dash": (1.5, 1.5)},
    "hp": {"colour": SYSTEM_SHADES["hexagonal"][1], "marker": "h", "dash": (6, 2, 1, 2)},
    # the nearest lattice with a mirror line (2D): a thin dark dashed line with crosses
    "mirror": {"colour": "#222222", "marker": "x", "dash": (3, 2)},
})
"""Bravais type (Pearson symbol, 2D symbol or ``mirror``) -> {colour, marker, dash}."""

_SYSTEM_STYLE = {s: {"colour": SYSTEM_SHADES[{"rhombohedral": "trigonal"}.get(s, s)][1], "marker": m,
                     "dash": d}
                 for s, m, d in (("monoclinic", "o", None), ("orthorhombic", "s", (5, 2)),
                                 ("tetragonal", "^", (2, 2)), ("rhombohedral", "p", (4, 1.5, 1, 1.5)),
                                 ("hexagonal", "h", (6, 2, 1, 2)), ("cubic", "D", (1, 1.5)))}

VERDICT_COLOURS = {"gained": "#D55E00", "lost": "#CC79A7", "changed": "#E69F00", "kept": "#009E73"}

CELL_STYLE = {
    "a": {"colour": "#1b9e77", "marker": "o", "dash": None},
    "b": {"colour": "#7570b3", "marker": "^", "dash": (5, 2)},
    "c": {"colour": "#555555", "marker": "s", "dash": (1.5, 1.5)},
    "alpha": {"colour": "#1b9e77", "marker": "o", "dash": None},
    "beta": {"colour": "#7570b3", "marker": "^", "dash": (5, 2)},
    "gamma": {"colour": "#555555", "marker": "s", "dash": (1.5, 1.5)},
    "area": {"colour": "#222222", "marker": "o", "dash": None},
    "volume": {"colour": "#222222", "marker": "o", "dash": None},
    "energy": {"colour": "#222222", "marker": "o", "dash": None},
    "fmax": {"colour": "#7570b3", "marker": "s", "dash": None},
    "chiral": {"colour": "#222222", "marker": "o", "dash": None},
    "chiral_deformation": {"colour": "#b35806", "marker": "D", "dash": (4, 2)},
}
"""Styles of the per-step quantities that are not Bravais types (cell parameters, energy, force)."""


def type_style(t: str) -> dict:
    """Style of a Bravais type symbol (unknown symbols: grey circles)."""
    return dict(TYPE_STYLE.get(t, {"colour": "#777777", "marker": "o", "dash": None}))


def system_style(system: str) -> dict:
    """Style of a 3D lattice system (``monoclinic`` ... ``cubic``; the distance-to-system plot)."""
    return dict(_SYSTEM_STYLE.get(system, {"colour": "#777777", "marker": "o", "dash": None}))


_SPACE_SYSTEMS = ((2, "triclinic"), (15, "monoclinic"), (74, "orthorhombic"), (142, "tetragonal"),
                  (167, "trigonal"), (194, "hexagonal"), (230, "cubic"))
_LAYER_SYSTEMS = ((2, "triclinic"), (18, "monoclinic"), (48, "orthorhombic"), (64, "tetragonal"),
                  (72, "trigonal"), (80, "hexagonal"))


def group_system(number: int, kind: str = "space") -> str | None:
    """Crystal system of a space-group (1-230) or layer-group (1-80) number; None outside the range."""
    table = _LAYER_SYSTEMS if kind == "layer" else _SPACE_SYSTEMS
    n = int(number or 0)
    if n < 1:
        return None
    for last, system in table:
        if n <= last:
            return system
    return None


def group_colour(number: int, kind: str = "space") -> str:
    """Colour of a group number: its crystal system's hue, shade ``number mod 5`` (0: failed)."""
    system = group_system(number, kind)
    if system is None:
        return FAILED_COLOUR
    return SYSTEM_SHADES[system][int(number) % 5]


# matplotlib's viridis at 0, 1/16, ..., 1 (colours of ionic steps on the layer map)
VIRIDIS = ("#440154", "#48186a", "#472d7b", "#424086", "#3b528b", "#33638d", "#2c728e", "#26828e",
           "#21918c", "#1fa088", "#28ae80", "#3fbc73", "#5ec962", "#84d44b", "#addc30", "#d8e219",
           "#fde725")


def viridis(t: float) -> str:
    """Hex colour of ``t`` in [0, 1] on viridis (linear between the 17 anchors above)."""
    n = len(VIRIDIS) - 1
    t = min(1.0, max(0.0, float(t))) * n
    i = min(int(t), n - 1)
    f = t - i
    a, b = VIRIDIS[i], VIRIDIS[i + 1]
    rgb = [round(int(a[k:k + 2], 16) * (1 - f) + int(b[k:k + 2], 16) * f) for k in (1, 3, 5)]
    return "#" + "".join(f"{c:02x}" for c in rgb)
