"""A store's housekeeping of whole runs: dropping, settling an interrupted one, replacing twins.

:class:`RunLifecycle` is mixed into :class:`~crankbeat.logger.store.Store`; it needs the store's
``db``, its per-run event counters ``_seq`` and :meth:`commit`.
"""

from __future__ import annotations

import sqlite_utils


class RunLifecycle:
    """Whole-run changes that commit at once."""

    db: sqlite_utils.Database
    _seq: dict[int, int]

    def rollback(self) -> None:
        """Drop what was written since the last commit (a write that could not be committed)."""
        self.db.conn.rollback()
        self._seq.clear()  # event numbers are read again from what the file holds

    def _run_tables(self) -> list[tuple[str, str]]:
        """(table, column) of every table that refers to runs (tables added later included)."""
        out = []
        for table in self.db.table_names():
            for fk in self.db.execute(f"PRAGMA foreign_key_list([{table}])").fetchall():
                if fk[2] == "runs":
                    out.append((table, fk[3]))
        return out

    def delete_run(self, run_id: int) -> None:
        """Remove a run and every row that belongs to it; commits."""
        if self.db.conn.in_transaction:
            self.rollback()
        for table, column in self._run_tables():
            self.db.execute(f"DELETE FROM [{table}] WHERE [{column}] = ?", (run_id,))
        self.db.execute("DELETE FROM runs WHERE id = ?", (run_id,))
        self._seq.pop(run_id, None)
        self.commit()

    def settle_interrupted(self, run_id: int) -> None:
        """An analysis was interrupted: keep what it committed, marked "interrupted"; a run
        with no event is removed."""
        if self.db.conn.in_transaction:
            self.commit()  # what was analysed up to the interruption is kept
        if self.db.execute("SELECT 1 FROM events WHERE run = ? LIMIT 1",
                           (run_id,)).fetchone() is None:
            self.delete_run(run_id)
            return
        self.db.execute("UPDATE runs SET status = 'interrupted' WHERE id = ?", (run_id,))
        self.commit()

    def delete_unfinished_twins(self, run_id: int) -> list[int]:
        """Remove the earlier runs of the same source files that never completed (a replay
        killed or interrupted): ``run_id`` replaces them. Returns their ids."""
        row = self.db.execute("SELECT source_key FROM runs WHERE id = ?", (run_id,)).fetchone()
        if row is None or row[0] is None:
            return []
        ids = [int(r[0]) for r in self.db.execute(
            "SELECT id FROM runs WHERE source_key = ? AND id < ? AND status != 'complete'",
            (row[0], run_id))]
        for other in ids:
            self.delete_run(other)
        return ids
