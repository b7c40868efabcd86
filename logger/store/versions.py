"""Runs under several analyser versions: a ride re-analysed keeps every earlier result.

Re-analyses of one ride share its source files (``runs.source_key``). Queries pick, per ride,
the newest analysis by default (the highest run id, written last), or the run of a named
analyser version. Runs without sources (live rides never replayed) stand for themselves.
"""

from __future__ import annotations

from typing import TYPE_CHECKING

from crankbeat.errors import RunNotFoundError

if TYPE_CHECKING:
    from crankbeat.logger.store.store import Store


def pick_analyses(store: Store, run_ids: list[int], analyser: str | None = None) -> set[int]:
    """Of ``run_ids``, the ones to show: per ride the newest analysis, or the runs of
    ``analyser`` (then runs of other versions are left out)."""
    if not run_ids:
        return set()
    marks = ", ".join("?" * len(run_ids))
    rows = store.db.execute(
        f"SELECT id, source_key, analyser FROM runs WHERE id IN ({marks})", list(run_ids)
    ).fetchall()
    if analyser is not None:
        return {rid for rid, _, a in rows if a == analyser}
    newest: dict[str, int] = {}
    out = set()
    for rid, key, _ in rows:
        if key is None:
            out.add(rid)
        elif rid > newest.get(key, -1):
            newest[key] = rid
    return out | set(newest.values())


def newest_analysis(store: Store, run_ids: list[int]) -> int | None:
    """The newest of ``run_ids`` when they are all analyses of one ride, else None."""
    marks = ", ".join("?" * len(run_ids))
    keys = {r[0] for r in store.db.execute(
        f"SELECT source_key FROM runs WHERE id IN ({marks})", list(run_ids))}
    if len(keys) != 1 or None in keys:
        return None
    return max(run_ids)


def resolve_versioned(store: Store, text: str) -> int:
    """``RUN@ANALYSER`` -> the analysis of that ride (run id, label or "last") by that version."""
    spec, _, analyser = text.rpartition("@")
    base = store.resolve_run(spec)
    key = store.db.execute("SELECT source_key FROM runs WHERE id = ?", (base,)).fetchone()[0]
    row = store.db.execute(
        "SELECT MAX(id) FROM runs WHERE analyser = ? AND (id = ? OR source_key = ?)",
        (analyser, base, key)).fetchone()
    if row[0] is None:
        versions = sorted({r[0] or "unknown" for r in store.db.execute(
            "SELECT analyser FROM runs WHERE id = ? OR source_key = ?", (base, key))})
        raise RunNotFoundError(f"run '{spec}' has no analysis by analyser '{analyser}' "
                               f"(it has: {', '.join(versions)})")
    return int(row[0])


def analysers(store: Store) -> list[str]:
    """Analyser versions present in the store, oldest first."""
    return [r[0] for r in store.db.execute(
        "SELECT analyser FROM runs WHERE analyser IS NOT NULL GROUP BY analyser"
        " ORDER BY MIN(id)")]
