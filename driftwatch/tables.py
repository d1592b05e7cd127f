"""Run records as tables for notebooks: per-frame and per-run pandas DataFrames, and cell parameters.

``frames_table(records)`` has one row per ionic step of every run; ``runs_table(records)`` one row per
run with the columns of ``campaign.csv`` (same names, same facts: :func:`driftwatch.records.csv_row`
and :func:`driftwatch.records.verdict_fields`), numbers as numbers. pandas is imported when a table is
made, not before. Lengths Å, angles degrees, energies eV, forces eV/Å.

Cell parameters are not stored in the record; :func:`cell_parameters` derives them from what it holds:
the obtuse superbase's conorms (p_ij = r_ij², the squares of the 2D root invariant or the 3D root
products). Its vectors satisfy |v_i|² = Σ_j≠i p_ij and v_i · v_j = -p_ij, which give the Gram matrix of
the **Selling-reduced cell**: the shortest two (2D) or three (3D) vectors of the obtuse superbase,
sorted so that a ≤ b (≤ c), every angle between them ≥ 90°. In 3D the three angles are given sorted
(alpha ≤ beta ≤ gamma), not paired with particular vectors: near a = b = c the pairing jumps from
frame to frame, the sorted values do not. It is the same lattice as the run's cell (same area or
volume) but not its conventional cell: a square lattice gives a = b, γ = 90°; a hexagonal one a = b,
γ = 120°; a cubic F one a = b = c = a_conv/√2, angles 90°, 120°, 120°.
"""

from __future__ import annotations

import math
import os
from pathlib import Path

import numpy as np

from . import records as _records

__all__ = ["cell_parameters", "frames_table", "runs_table", "CELL_COLUMNS"]

CELL_COLUMNS = {2: ("a", "b", "gamma", "area"), 3: ("a", "b", "c", "alpha", "beta", "gamma", "volume")}
"""Cell-parameter names by dimension (Å, degrees, Å² or Å³)."""

_PAIRS3 = ((0, 1), (0, 2), (0, 3), (1, 2), (1, 3), (2, 3))   # order of the record's root_products


def _gram_from_conorms(p, dim):
    """(n, dim, dim) Gram matrices of the Selling-reduced cell from (n, 3|6) conorms (Å²)."""
    n = p.shape[0]
    k = dim + 1
    pm = np.zeros((n, k, k))
    pairs = ((1, 2), (0, 1), (0, 2)) if dim == 2 else _PAIRS3  # 2D: [p12, p01, p02]
    for s, (i, j) in enumerate(pairs):
        pm[:, i, j] = pm[:, j, i] = p[:, s]
    norms = pm.sum(axis=2)                                   # |v_i|² = Σ_j p_ij
    order = np.argsort(norms, axis=1, kind="stable")[:, :dim]   # drop the longest vector
    rows = np.arange(n)[:, None]
    g = -pm[rows[:, :, None], order[:, :, None], order[:, None, :]]
    g[:, np.arange(dim), np.arange(dim)] = norms[rows, order]
    return g


def cell_parameters(record: dict) -> dict:
    """Per-frame parameters of the Selling-reduced cell from the record's invariants (module doc).

    Returns ``{name: (n_frames,) array}`` with the names of :data:`CELL_COLUMNS` for the record's
    dimension; NaN for frames without invariants.
    """
    dim = int(record["geometry"]["dimension"])
    key = "root_invariant" if dim == 2 else "root_products"
    width = 3 if dim == 2 else 6
    rows = []
    for f in record["frames"]:
        r = f.get(key)
        rows.append([np.nan] * width if not r or len(r) != width or None in r else r)
    p = np.asarray(rows, float) ** 2
    g = _gram_from_conorms(np.nan_to_num(p), dim)
    bad = ~np.isfinite(p).all(axis=1)
    lengths = np.sqrt(np.einsum("nii->ni", g))
    with np.errstate(invalid="ignore", divide="ignore"):
        def angle(i, j):
            c = g[:, i, j] / (lengths[:, i] * lengths[:, j])
            return np.degrees(np.arccos(np.clip(c, -1.0, 1.0)))
        size = np.sqrt(np.clip(np.linalg.det(g), 0.0, None))
    if dim == 2:
        out = {"a": lengths[:, 0], "b": lengths[:, 1], "gamma": angle(0, 1), "area": size}
    else:
        # angles sorted: near a = b = c the pairing of an angle with two vectors jumps from frame to
        # frame, the sorted three do not (an fcc lattice gives 90, 120, 120)
        ang = np.sort(np.stack([angle(1, 2), angle(0, 2), angle(0, 1)], axis=1), axis=1)
        out = {"a": lengths[:, 0], "b": lengths[:, 1], "c": lengths[:, 2], "alpha": ang[:, 0],
               "beta": ang[:, 1], "gamma": ang[:, 2], "volume": size}
    for v in out.values():
        v[bad] = np.nan
    return out


# ------------------------------------------------------------------------------------------ inputs

def _iter_records(items):
    """(name, record) of record dicts, record files, folders of them or an audit's output folder."""
    if isinstance(items, (dict, str, os.PathLike)):
        items = [items]
    for k, item in enumerate(items):
        if isinstance(item, dict):
            r = item.get("run") or {}
            yield str(r.get("run_dir") or r.get("source") or f"run{k}"), item
            continue
        p = Path(item)
        if p.is_dir():
            ids = _audit_ids(p)
            sub = p / "records" if (p / "records").is_dir() else p
            for f in sorted(sub.glob("*.json")):
                yield ids.get(f.resolve(), f.stem), _records.read_json(f)
        else:
            yield p.stem, _records.read_json(p)


def _audit_ids(folder: Path) -> dict:
    """Record file -> run id, from an audit's ``campaign.json`` (the ids campaign.csv uses)."""
    for summary in (folder / "campaign.json", folder.parent / "campaign.json"):
        listed = _json_dict(summary).get("records")
        if isinstance(listed, dict):
            return {(summary.parent / rel).resolve(): rid for rid, rel in listed.items()}
    return {}


def _audit_summary(item) -> dict:
    """An audit output folder's ``campaign.json`` (``{}`` for anything else)."""
    if isinstance(item, dict) or not Path(item).is_dir():
        return {}
    return _json_dict(Path(item) / "campaign.json")


def _json_dict(path: Path) -> dict:
    import json
    try:
        got = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {}
    return got if isinstance(got, dict) else {}


def _pandas():
    import pandas
    return pandas


def frames_table(records):
    """One row per ionic step of every run (pandas DataFrame).

    ``records``: record dicts, record files, folders of records or an audit output folder. Columns:
    ``run``, ``dimension``, ``index``, ``step``, ``energy`` (eV), ``fmax`` (eV/Å), the cell parameters
    of :func:`cell_parameters` (Å, degrees), ``deformation_<type>`` and ``distance_<type>`` (Å) for
    each Bravais type, layers also ``sign`` and ``chiral_distance`` (Å), bulk ``system_<system>`` (Å),
    and on the frames spglib was asked about ``group`` and ``group_symbol`` at ``group_symprec`` (Å,
    the verdict's ``rules.structure.symprec``).
    """
    rows = []
    for name, rec in _iter_records(records):
        dim = rec["geometry"]["dimension"]
        cell = cell_parameters(rec)
        sym = (rec["summary"]["verdict"].get("structure") or {}).get("symprec")
        for i, f in enumerate(rec["frames"]):
            row = {"run": name, "dimension": dim, "index": f.get("index", i),
                   "step": f.get("step", i), "energy": f.get("energy"), "fmax": f.get("fmax")}
            row.update({k: float(v[i]) for k, v in cell.items()})
            for t, v in (f.get("deformation") or {}).items():
                row[f"deformation_{t}"] = v
            for t, v in (f.get("distance") or {}).items():
                row[f"distance_{t}"] = v
            if dim == 2:
                row["sign"] = f.get("sign")
                row["chiral_distance"] = f.get("chiral_distance")
            for s, v in (f.get("systems") or {}).items():
                row[f"system_{s}"] = v
            st = f.get("structure") or {}
            if st.get("symprec") and sym is not None:
                k = min(range(len(st["symprec"])), key=lambda j: abs(math.log(st["symprec"][j] / sym)))
                row.update(group_symprec=st["symprec"][k], group=st["group"][k],
                           group_symbol=st["symbol"][k])
            rows.append(row)
    df = _pandas().DataFrame(rows)
    for col in ("energy", "fmax", "sign", "chiral_distance", "group", "group_symprec"):
        if col in df:
            df[col] = _pandas().to_numeric(df[col], errors="coerce")
    return df


def runs_table(records):
    """One row per run with the columns of ``campaign.csv`` (``records.CSV_COLUMNS``), numbers as
    numbers (Å for the ``_A`` columns), ``flags`` and ``warnings`` as in the CSV; an audit's
    output folder also gives its failed and skipped runs, as campaign.csv does."""
    rows = []
    for name, rec in _iter_records(records):
        row = _records.csv_row(rec, name)
        for key, val in _records.verdict_fields(rec).items():
            col = key + "_A" if key + "_A" in row else key
            row[col] = val
        rows.append(row)
    for item in [records] if isinstance(records, (dict, str, os.PathLike)) else records:
        summary = _audit_summary(item)
        rows += _records.unanalysed_rows(summary.get("failed") or (), summary.get("skipped") or ())
    rows.sort(key=lambda row: row["run"])
    df = _pandas().DataFrame(rows, columns=list(_records.CSV_COLUMNS))
    for col in ("dimension", "n_frames", "n_atoms", "lattice_from_step", "group_from_step"):
        df[col] = _pandas().to_numeric(df[col], errors="coerce").astype("Int64")
    return df
