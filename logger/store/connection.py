"""Opening the SQLite file of a store: access, connection, and the checks before any write."""

from __future__ import annotations

import os
import sqlite3
from pathlib import Path

import sqlite_utils

from crankbeat.errors import StoreError
from crankbeat.logger.store.schema import SCHEMA_VERSION, current_version, migrate


def writable(path: Path) -> bool:
    """The file and its folder can be written (SQLite's journal lives beside the file)."""
    return os.access(path, os.W_OK) and os.access(path.parent, os.W_OK)


def damaged_message(path: Path, problem: str) -> str:
    return (f"store '{path}' is damaged ({problem.strip()}): nothing is written into it; copy "
            "it and recover the copy with the sqlite3 shell's .recover")


def connect(path: Path, *, read_only: bool, timeout: float) -> sqlite3.Connection:
    # check_same_thread=False: the live pipeline may write from its worker thread.
    if not read_only:
        return sqlite3.connect(str(path), check_same_thread=False, timeout=timeout)
    uri = path.resolve().as_uri()
    try:
        conn = sqlite3.connect(f"{uri}?mode=ro", uri=True, check_same_thread=False,
                               timeout=timeout)
        conn.execute("SELECT count(*) FROM sqlite_master").fetchone()
        return conn
    except sqlite3.OperationalError:
        # a WAL store on a read-only mount: its shared-memory file cannot be made there, and
        # nobody can change the file either, so it is read as immutable
        return sqlite3.connect(f"{uri}?immutable=1", uri=True, check_same_thread=False,
                               timeout=timeout)


def prepare_file(db: sqlite_utils.Database, path: Path, *, read_only: bool, check: bool) -> None:
    """Check that the open file is an intact crankbeat store of a schema this version knows;
    when it may be written, switch on WAL and foreign keys and migrate it to the current schema.
    """
    conn = db.conn
    # what the file is, before anything is changed in it (not even the journal mode)
    names = db.table_names()
    if names and "schema_version" not in names:
        raise StoreError(
            f"'{path}' is an SQLite file but not a crankbeat store "
            f"(tables: {', '.join(names[:5])}): left unchanged"
        )
    if names and check:
        try:
            found = "\n".join(r[0] for r in conn.execute("PRAGMA quick_check(5)"))
        except sqlite3.DatabaseError as exc:
            found = str(exc)
        if found != "ok":
            problems = [ln for ln in found.splitlines() if ln and not ln.startswith("***")]
            raise StoreError(damaged_message(path, problems[0] if problems else found))
    have = current_version(db) if names else 0
    if have > SCHEMA_VERSION:
        raise StoreError(
            f"store '{path}' has schema version {have}; this crankbeat knows up to "
            f"{SCHEMA_VERSION} (update crankbeat)"
        )
    if read_only:
        if have < SCHEMA_VERSION:
            raise StoreError(f"store '{path}' is read-only and has the older schema "
                             f"version {have}: open it once where it can be written")
        return
    conn.execute("PRAGMA journal_mode=WAL")
    conn.execute("PRAGMA foreign_keys=ON")
    migrate(db)
