"""Run bookkeeping: key=value tags on runs, deleting a run, and which run "last" means.

Tags say what a run was ridden with (``bike=larch-2``, ``tyre=new``, ``fuel=98``): one value per
key and run. Trends filter on them. A run that holds no events (a replay that failed before the
first chunk, a ride stopped at once) is bookkeeping noise: "last" passes over it.
"""

from __future__ import annotations

import re
from typing import TYPE_CHECKING

from crankbeat.errors import RunNotFoundError, UsageError

if TYPE_CHECKING:
    from crankbeat.logger.store.store import Store

_KEY = re.compile(r"^[A-Za-z][A-Za-z0-9_.-]{0,31}$")


def parse_tag(text: str) -> tuple[str, str]:
    """``"tyre=new"`` -> ``("tyre", "new")``; anything else is a :class:`UsageError`."""
    key, sep, value = str(text).partition("=")
    key, value = key.strip(), value.strip()
    if not sep or not _KEY.match(key) or not value:
        raise UsageError(f"bad tag '{text}': expected KEY=VALUE, e.g. tyre=new (a key starts "
                         "with a letter; letters, digits, _ . - only)")
    return key, value


def set_tags(store: Store, run_id: int, tags: dict[str, str]) -> None:
    """Set (or replace) tags of a run."""
    store._check_run(run_id)
    for key, value in tags.items():
        store.db.execute("INSERT OR REPLACE INTO run_tags (run, key, value) VALUES (?, ?, ?)",
                         (run_id, key, value))
    store.commit()


def remove_tags(store: Store, run_id: int, keys: list[str]) -> int:
    """Remove tags of a run by key; returns how many were there."""
    store._check_run(run_id)
    n = 0
    for key in keys:
        n += store.db.execute("DELETE FROM run_tags WHERE run = ? AND key = ?",
                              (run_id, key)).rowcount
    store.commit()
    return n


def tags_of(store: Store, run_id: int) -> dict[str, str]:
    return {k: v for k, v in store.db.execute(
        "SELECT key, value FROM run_tags WHERE run = ? ORDER BY key", (run_id,))}


def runs_with_tags(store: Store, tags: dict[str, str]) -> set[int]:
    """Ids of the runs carrying every one of ``tags``."""
    ids: set[int] | None = None
    for key, value in tags.items():
        have = {r[0] for r in store.db.execute(
            "SELECT run FROM run_tags WHERE key = ? AND value = ?", (key, value))}
        ids = have if ids is None else ids & have
    return ids or set()


def delete_run(store: Store, run_id: int) -> dict[str, int]:
    """Remove a run and every row that belongs to it; returns rows removed per table.

    Every table with a ``run`` column is cleared (so tables added by later migrations are too);
    a tooth-error correction learnt on the run stays (it describes the wheel, not the run) with
    its run reference cleared.
    """
    store._check_run(run_id)
    removed: dict[str, int] = {}
    tables = [r[0] for r in store.db.execute(
        "SELECT name FROM sqlite_master WHERE type = 'table'")]
    for table in tables:
        cols = {r[1] for r in store.db.execute(f"PRAGMA table_info([{table}])")}
        if "run" not in cols:
            continue
        if table == "tooth_errors":
            store.db.execute("UPDATE tooth_errors SET run = NULL WHERE run = ?", (run_id,))
            continue
        removed[table] = store.db.execute(f"DELETE FROM [{table}] WHERE run = ?",
                                          (run_id,)).rowcount
    removed["runs"] = store.db.execute("DELETE FROM runs WHERE id = ?", (run_id,)).rowcount
    store.commit()
    return removed


def last_run(store: Store) -> int:
    """The newest run that holds events (failed or empty runs are passed over)."""
    row = store.db.execute(
        "SELECT MAX(id) FROM runs WHERE EXISTS (SELECT 1 FROM events e WHERE e.run = runs.id)"
    ).fetchone()
    if row[0] is None:
        raise RunNotFoundError(f"store '{store.path}' holds no run with events yet")
    return int(row[0])
