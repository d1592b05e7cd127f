"""The campaign's ASE database: one row per run, final structure plus searchable key-value pairs.

Any ``ase.db.connect`` name works (``runs.db`` SQLite by default, ``.json``, ``postgresql://...``).
Rows are keyed by ``run_id`` and updated in place: a re-audit rewrites a run's row under the same
row id (its structure and key-value pairs; keys it no longer has are removed), so ``id`` stays
stable for a run; a run seen for the first time gets a new row. Rows of other runs are never
touched (a run that left the campaign keeps its last row). All rows go in one ``with db:``
transaction. Key names are the CSV's column names (``records.db_key_values``). Text values are
stored as :func:`driftwatch.records.shown` spells them (a name that is not UTF-8 on disk gets
``\\xNN`` for its odd bytes), so the same run always has the same ``run_id``.

ase.db guards a file database with ``<file>.lock`` and waits for it *forever*; a job killed while
writing leaves that file behind. :func:`check_lock` therefore refuses to start when the lock file
exists (one-line :class:`~driftwatch.errors.OutputError` naming it), and the lock's own wait is
capped at :data:`LOCK_WAIT_S` so a lock taken by another writer between the check and the write
cannot hang the audit either.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from .errors import OutputError

__all__ = ["db_location", "lock_path", "check_lock", "write_rows", "LOCK_WAIT_S"]

LOCK_WAIT_S = 10.0
_URL_PREFIXES = ("postgresql://", "postgres://", "mysql://", "mariadb://")


def db_location(db, output: Path) -> str:
    """The database name: ``OUTPUT/runs.db`` by default, a URL unchanged, a file path absolute."""
    if db is None:
        return str((Path(output) / "runs.db").absolute())
    db = str(db)
    if db.startswith(_URL_PREFIXES):
        return db
    return str(Path(db).expanduser().absolute())


def lock_path(name: str) -> Path | None:
    """ase.db's lock file for a file database (None for server URLs)."""
    if name.startswith(_URL_PREFIXES):
        return None
    return Path(os.path.abspath(name) + ".lock")


def clear_stale_lock(name: str) -> Path | None:
    """Remove ase.db's lock file of ``name`` and return its path, when it is a plain file (None
    when there is none). Only for a database no other writer can hold: an audit folder's own
    runs.db, written by one audit of that folder at a time (its audit lock), so a lock file there
    was left by a killed audit."""
    lock = lock_path(name)
    if lock is None or not lock.is_file() or lock.is_symlink():
        return None
    try:
        lock.unlink()
    except OSError:
        return None          # check_lock then names it
    return lock


def check_lock(name: str) -> None:
    """Raise OutputError when ase.db's lock file of ``name`` exists (ase.db would wait forever)."""
    lock = lock_path(name)
    if lock is not None and os.path.lexists(lock):      # a dangling link too (ase.db would wait)
        raise OutputError(f"{lock}: lock file of the results database exists (a killed job leaves "
                          f"one); delete it if no other driftwatch audit or ase.db writer is "
                          f"running, then re-run (finished runs come from the cache)")


def _foreign_sqlite(name: str) -> str | None:
    """The tables of an existing SQLite file that is not an ase.db (another application's
    database, which ase.db would add its tables to), else None."""
    import sqlite3
    p = Path(name)
    if name.startswith(_URL_PREFIXES) or not p.is_file() or p.stat().st_size == 0:
        return None
    with open(p, "rb") as fh:
        if fh.read(16) != b"SQLite format 3\x00":
            return _NOT_SQLITE               # damaged, or another kind of file
    try:
        con = sqlite3.connect(f"file:{p}?mode=ro", uri=True)
        try:
            tables = {r[0] for r in con.execute("SELECT name FROM sqlite_master WHERE "
                                                "type = 'table'")}
        finally:
            con.close()
    except sqlite3.Error:
        return None
    if not tables or {"systems", "information"} <= tables:
        return None
    return ", ".join(sorted(tables)[:8])


_NOT_SQLITE = "(no SQLite file)"


def check_foreign(name: str) -> None:
    """Raise OutputError when ``name`` is another application's SQLite database, or no SQLite
    file at all (a damaged database: re-running would meet it again)."""
    foreign = _foreign_sqlite(name)
    if foreign == _NOT_SQLITE:
        raise OutputError(f"{name}: not an SQLite database (damaged, or another kind of file); "
                          f"move it away (an audit then writes a new one), or choose another "
                          f"file for the results database (--db)")
    if foreign:
        raise OutputError(f"{name}: a SQLite database that is not an ase.db (tables: {foreign}); "
                          f"choose another file for the results database (--db)")


def _connect(name: str):
    import ase.db
    check_foreign(name)
    try:
        db = ase.db.connect(name, use_lock_file=lock_path(name) is not None)
    except (ValueError, ImportError, OSError) as exc:
        raise OutputError(f"{name}: cannot open the results database ({type(exc).__name__}: "
                          f"{exc})") from exc
    if getattr(db, "lock", None) is not None:
        db.lock.timeout = LOCK_WAIT_S
    return db


def _atoms(structure: dict | None):
    from ase import Atoms
    if not structure:
        return Atoms()
    return Atoms(numbers=structure["numbers"], positions=structure["positions"],
                 cell=structure["cell"], pbc=structure["pbc"])


def _rows_with_run_id(db):
    """Every row that has a ``run_id`` (one pass: a per-run query is a full scan, O(n^2))."""
    try:
        return list(db.select("run_id", include_data=False,
                              columns=["id", "key_value_pairs", "numbers", "positions", "cell",
                                       "pbc"]))
    except TypeError:        # backends without the columns argument
        return list(db.select("run_id", include_data=False))


def _natoms(row) -> int:
    try:
        return int(row.natoms)
    except (AttributeError, TypeError):      # a backend that did not return the column
        return 0


def _same(row, structure: dict | None, kvp: dict) -> bool:
    """True when a stored row already holds exactly these key-value pairs and this structure."""
    try:
        if dict(row.key_value_pairs) != kvp:
            return False
        if not structure:
            return _natoms(row) == 0
        return (np.array_equal(row.numbers, structure["numbers"])
                and np.array_equal(row.positions, structure["positions"])
                and np.array_equal(np.asarray(row.cell), structure["cell"])
                and np.array_equal(row.pbc, structure["pbc"]))
    except (AttributeError, TypeError, ValueError, KeyError):
        return False        # a backend without these columns: rewrite the row


def _delete(db, ids) -> None:
    """Delete rows inside the open transaction. ase.db's SQLite ``delete`` commits and runs VACUUM
    on its own, so a failure after it would leave the database neither old nor new; its row
    deletion itself (``_delete`` over every table) is used here, and VACUUM left out (SQLite reuses
    the freed pages). Other back ends: their ``delete``."""
    try:
        from ase.db.sqlite import all_tables
        tables = db._get_external_table_names() + all_tables[::-1]
        delete_in = db._delete
    except (ImportError, AttributeError):
        db.delete(ids)
        return
    with db.managed_connection() as con:
        delete_in(con.cursor(), ids, tables=tables)


def write_rows(name: str, rows: list[tuple[str, dict | None, dict]], remove=()) -> list[str]:
    """Upsert rows ``(run_id, structure or None, key_value_pairs)`` and delete the rows of the run
    ids in ``remove`` (runs gone from the campaign), in one transaction.

    Returns one-line problems for rows ase.db rejected (the other rows are still written).
    Raises OutputError for a locked or unwritable database.
    """
    from .records import shown
    rows = [(shown(run_id), structure,
             {k: shown(v) if isinstance(v, str) else v for k, v in kvp.items()}
             | {"run_id": shown(run_id)}) for run_id, structure, kvp in rows]
    check_lock(name)
    local = not name.startswith(_URL_PREFIXES)
    if local:
        Path(name).parent.mkdir(parents=True, exist_ok=True)
    new = local and not os.path.lexists(name)
    db = _connect(name)
    problems = []
    try:
        with db:
            wanted = {run_id for run_id, _, _ in rows}
            gone = {shown(r) for r in remove} - wanted
            have: dict = {}                        # run_id -> its stored row
            drop = []                  # rows of gone runs, second rows of one run (older versions)
            for row in sorted(_rows_with_run_id(db), key=lambda r: r.id):
                rid = shown(row.get("run_id"))      # rows written with raw names match too
                if rid in gone:
                    drop.append(row.id)
                if rid not in wanted:
                    continue
                if rid in have:
                    drop.append(row.id)
                else:
                    have[rid] = row
            if drop:
                _delete(db, drop)
            for run_id, structure, kvp in rows:
                try:
                    if run_id not in have:
                        db.write(_atoms(structure), key_value_pairs=kvp)
                        continue
                    row = have[run_id]
                    if _same(row, structure, kvp):     # a re-audit of unchanged runs writes nothing
                        continue
                    if structure is None and _natoms(row):   # ok before, failed now: no structure
                        _delete(db, [row.id])          # (ase.db cannot empty a row in place)
                        db.write(_atoms(None), key_value_pairs=kvp)
                        continue
                    db.update(row.id, atoms=_atoms(structure) if structure else None,
                              delete_keys=sorted(set(row.key_value_pairs) - set(kvp)), **kvp)
                except (ValueError, KeyError, TypeError) as exc:
                    problems.append(f"{run_id}: database row rejected ({exc})")
    except TimeoutError as exc:
        raise OutputError(f"{lock_path(name)}: results database is locked by another writer "
                          f"(waited {LOCK_WAIT_S:g} s); delete the lock file if none is running"
                          ) from exc
    except OutputError:
        raise
    except Exception as exc:  # sqlite3.OperationalError ('database is locked'), disk full, ...
        raise OutputError(f"{name}: cannot write the results database ({type(exc).__name__}: "
                          f"{exc})") from exc
    if new and os.path.isfile(name):        # SQLite makes it 0644: give it the user's usual mode
        from .records import FILE_MODE      # (a group-shared folder: colleagues re-audit)
        os.chmod(name, FILE_MODE)
    return problems
