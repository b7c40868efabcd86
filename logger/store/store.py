"""The :class:`Store`: one SQLite file per test programme (see the package docstring).

This module opens the file and writes runs; reading is :class:`~.queries.RunQueries`, whole-run
housekeeping :class:`~.lifecycle.RunLifecycle`; rows are shaped by :mod:`.rows` and :mod:`.records`.
"""

from __future__ import annotations

import hashlib
import json
import math
import os
import sqlite3
from collections.abc import Iterable, Mapping, Sequence
from datetime import datetime
from pathlib import Path
from typing import Any

import numpy as np
import sqlite_utils

from crankbeat.dsp.events import COUNTED_VERDICTS, MASKED
from crankbeat.errors import StoreError
from crankbeat.logger.store.connection import connect, damaged_message, prepare_file, writable
from crankbeat.logger.store.lifecycle import RunLifecycle
from crankbeat.logger.store.queries import RunQueries
from crankbeat.logger.store.records import (
    INTERVAL_COLUMNS,
    VIBRATION_COLUMNS,
    WINDOW_COLUMNS,
    jsonable,
    rig_text,
    sha256_file,
    utc_iso,
    verdict_code,
)
from crankbeat.logger.store.rows import (
    CHANNEL_ROW,
    EVENT_ROW,
    ORDER_MAP_COLUMNS,
    RunRows,
    channel_rows,
    event_rows,
    interval_rows,
    order_map_row,
    vibration_rows,
    window_rows,
)
from crankbeat.logger.store.schema import current_version, source_key

#: Events turned into rows and inserted per call when a whole run is stored (bounded lists).
EVENT_BLOCK = 20_000

__all__ = ["Store", "jsonable", "sha256_file", "utc_iso", "verdict_code"]


class Store(RunQueries, RunLifecycle):
    """A crankbeat SQLite store. Use :meth:`open`; close it (or use it as a context manager).

    Writes go into one open transaction until :meth:`commit` (the pipeline commits at least
    once a second live, and at the end of a replay); whatever was committed survives a kill.
    """

    def __init__(self, path: Path, conn: sqlite3.Connection) -> None:
        self.path = path
        self.db = sqlite_utils.Database(conn)
        self._seq: dict[int, int] = {}
        self.read_only = False

    # -- opening -------------------------------------------------------------------------
    @classmethod
    def open(cls, path: str | os.PathLike, *, create: bool = True,
             timeout: float = 10.0) -> Store:
        """Open (and create or migrate) the store file at ``path``.

        ``create=False`` is for queries: a missing file is then a :class:`StoreError` instead of
        a new empty store, and a file on a read-only mount (or not writable) is opened
        read-only. ``create=True`` is for writing: the file must be a crankbeat store (another
        program's SQLite file is refused before anything is changed in it), intact
        (``PRAGMA quick_check``) and writable. ``timeout`` is how long to wait for another
        program's lock, s.
        """
        path = Path(path)
        if not path.exists():
            if not create:
                raise StoreError(
                    f"no store file '{path}' (give --store, set CRANKBEAT_STORE, "
                    "or make one with 'crankbeat replay')"
                )
            if not path.parent.exists():
                raise StoreError(f"cannot create store '{path}': folder '{path.parent}' is missing")
        read_only = path.exists() and not writable(path)
        if read_only and create:
            raise StoreError(f"store '{path}' is read-only (file, folder or mount): runs cannot "
                             "be written into it (queries such as 'crankbeat runs' work)")
        try:
            conn = connect(path, read_only=read_only, timeout=timeout)
        except sqlite3.Error as exc:
            raise StoreError(f"cannot open store '{path}': {exc}") from None
        store = cls(path, conn)
        store.read_only = read_only
        try:
            prepare_file(store.db, path, read_only=read_only, check=create)
        except sqlite3.OperationalError as exc:
            conn.close()
            if "locked" in str(exc) or "busy" in str(exc):
                raise StoreError(f"store '{path}' is locked by another program ({exc}); "
                                 "try again when it is done") from None
            raise StoreError(f"cannot open store '{path}': {exc}") from None
        except sqlite3.DatabaseError as exc:
            conn.close()
            if "malformed" in str(exc):
                raise StoreError(damaged_message(path, str(exc))) from None
            raise StoreError(f"'{path}' is not a crankbeat store ({exc})") from None
        except BaseException:
            conn.close()
            raise
        return store

    @property
    def schema_version(self) -> int:
        return current_version(self.db)

    def close(self) -> None:
        """Commit what is pending and close the file."""
        conn = self.db.conn
        try:
            conn.commit()
        finally:
            conn.close()

    def __enter__(self) -> Store:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def commit(self) -> None:
        """Make everything written so far durable."""
        self.db.conn.commit()

    # -- writing a run -------------------------------------------------------------------
    def _rig_id(self, rig: Any) -> int:
        text = rig_text(rig)
        digest = hashlib.sha256(text.encode("utf-8")).hexdigest()
        name = str(getattr(rig, "name", rig))
        row = self.db.execute(
            "SELECT id FROM rigs WHERE name = ? AND file_hash = ?", (name, digest)
        ).fetchone()
        if row:
            return int(row[0])
        cur = self.db.execute(
            "INSERT INTO rigs (name, file_hash, toml, created) VALUES (?, ?, ?, ?)",
            (name, digest, text, utc_iso()),
        )
        return int(cur.lastrowid)

    def begin_run(
        self,
        rig: Any,
        *,
        label: str | None = None,
        notes: str | None = None,
        odometer_km: float | None = None,
        sources: Iterable[tuple] = (),
        started_at: datetime | float | str | None = None,
        analyser: str | None = None,
        commit: bool = True,
    ) -> int:
        """Start a run (status "incomplete") and return its id.

        ``sources`` holds ``(path, sha256)`` or ``(path, sha256, kind)`` per input file; kind is
        e.g. "can" or "accel:bar_left" (default: "can" for the first, "accel" for the others).
        The run, its rig and sources are committed at once so that even a ride killed in its
        first second leaves a visible run (``commit=False``: a writer storing a whole analysis
        commits once, at :meth:`finish_run`). ``analyser`` names the analyser version.
        """
        if odometer_km is not None and not (
            isinstance(odometer_km, int | float) and math.isfinite(odometer_km) and odometer_km >= 0
        ):
            raise StoreError(f"odometer_km must be a number >= 0, got {odometer_km!r}")
        rig_id = self._rig_id(rig)
        src = []
        for i, item in enumerate(sources):
            path, sha = str(item[0]), str(item[1])
            kind = str(item[2]) if len(item) > 2 else ("can" if i == 0 else "accel")
            size = os.path.getsize(path) if os.path.isfile(path) else None
            src.append((path, sha, kind, size))
        key = source_key([s[1] for s in src]) if src else None
        cur = self.db.execute(
            "INSERT INTO runs (rig_id, started_at, label, notes, odometer_km, status, created,"
            " source_key, analyser) VALUES (?, ?, ?, ?, ?, 'incomplete', ?, ?, ?)",
            (rig_id, utc_iso(started_at), label, notes, odometer_km, utc_iso(), key, analyser),
        )
        run_id = int(cur.lastrowid)
        self.db.conn.executemany(
            "INSERT INTO sources (run, path, sha256, kind, bytes) VALUES (?, ?, ?, ?, ?)",
            [(run_id, *s) for s in src],
        )
        self._seq[run_id] = 0
        if commit:
            self.commit()
        return run_id

    def add_channels(self, run_id: int, channels: Mapping[str, tuple]) -> int:
        """Append status-channel rows: ``{name: (t, value)}`` (arrays, s and the channel's unit)."""
        return self._insert("channels", CHANNEL_ROW, run_id, channel_rows(channels))

    def add_events(self, run_id: int, events: np.ndarray) -> int:
        """Append firing events (an array of :data:`dsp.events.EVENT_DTYPE`); return the count.

        One ``executemany`` in the open transaction; call :meth:`commit` to make it durable.
        """
        if run_id not in self._seq:
            self._check_run(run_id)
            row = self.db.execute("SELECT MAX(seq) FROM events WHERE run = ?", (run_id,)).fetchone()
            self._seq[run_id] = -1 if row[0] is None else int(row[0])
            self._seq[run_id] += 1
        start = self._seq[run_id]
        n = self._insert("events", EVENT_ROW, run_id, event_rows(events, start), check=False)
        self._seq[run_id] = start + n
        return n

    def mask_events(self, run_id: int, spans: Iterable[tuple[float, float]]) -> int:
        """Mark the judged events (fired, partial, misfire) of a run inside each ``(t0, t1)`` span
        "masked".

        Rough-road spans are known only after the events in them were written; unusable and
        fuel-cut events keep their verdict. Returns the number of events changed.
        """
        changed = 0
        for t0, t1 in spans:
            cur = self.db.conn.execute(
                "UPDATE events SET verdict = ? WHERE run = ? AND t >= ? AND t <= ?"
                f" AND verdict IN ({', '.join('?' * len(COUNTED_VERDICTS))})",
                (MASKED, run_id, float(t0), float(t1), *COUNTED_VERDICTS),
            )
            changed += cur.rowcount
        return changed

    def add_windows(self, run_id: int, rows: Any, *, kind: str | None = None) -> int:
        """Append misfire-rate windows.

        Fields: ``kind`` ("rev200", "rev1000" or "rpm-band"; or give ``kind=`` for all rows),
        ``index`` (window number) or ``band`` ("LO-HI" rpm), ``cylinder`` (0 = all),
        ``t_start``, ``t_end`` (s), ``events`` (counted events), ``misfires``, ``rate`` (%).
        A :data:`dsp.analysis.WINDOW_DTYPE` array works as is (whole-engine rows, numbered in
        order); see also :meth:`add_window_rates`.
        """
        return self._insert("windows", WINDOW_COLUMNS, run_id, window_rows(rows, kind))

    def add_window_rates(self, run_id: int, kind: str, windows: np.ndarray,
                         per_cylinder_pct: np.ndarray | None = None) -> int:
        """Store the result of :func:`dsp.analysis.window_rates` as it comes.

        ``windows`` (WINDOW_DTYPE) become cylinder-0 rows; ``per_cylinder_pct[w, c]`` becomes
        the rate of cylinder c + 1 in window w (its counts are not known, so they stay NULL).
        Window numbers are the row positions (windows holding events, in order).
        """
        n = self.add_windows(run_id, windows, kind=kind)
        if per_cylinder_pct is None:
            return n
        pct = np.asarray(per_cylinder_pct, dtype=float)
        if pct.ndim != 2 or pct.shape[0] != len(windows):
            raise StoreError(f"add_window_rates: per_cylinder_pct has shape {pct.shape}, "
                             f"expected ({len(windows)}, n_cylinders)")
        t0 = np.asarray(windows["t_start"], dtype=float)
        t1 = np.asarray(windows["t_end"], dtype=float)
        rows = [{"idx": w, "cylinder": c + 1, "rate": pct[w, c], "t_start": t0[w],
                 "t_end": t1[w]} for w in range(pct.shape[0]) for c in range(pct.shape[1])]
        return n + self.add_windows(run_id, rows, kind=kind)

    def add_intervals(self, run_id: int, rows: Any) -> int:
        """Append firing-interval checks: ``from_cyl``, ``to_cyl`` (1-based), ``expected_deg``,
        ``observed_deg``, ``stderr_deg``, ``n`` (intervals averaged), ``flagged`` (0/1).

        A list of :class:`dsp.intervals.IntervalResult` works as is (``from_cylinder``,
        ``to_cylinder`` and ``uncertainty_deg`` are taken for the short names; ``spread_deg`` is
        not stored)."""
        return self._insert("intervals", INTERVAL_COLUMNS, run_id, interval_rows(rows))

    def add_vibration(self, run_id: int, rows: Any) -> int:
        """Append vibration levels: ``sensor``, ``rpm_lo``, ``rpm_hi`` (rpm), ``axis`` ("x", "y",
        "z" or "sum" for the vector sum), ``weighting`` ("Wh", "Wk", "Wd" or "none"), ``rms``
        (m/s²), ``n`` (samples)."""
        return self._insert("vibration", VIBRATION_COLUMNS, run_id, vibration_rows(rows))

    def add_order_map(
        self,
        run_id: int,
        *,
        sensor: str,
        rpm_lo: Sequence[float],
        rpm_hi: Sequence[float],
        orders: Sequence[float],
        amplitude: np.ndarray,
        axis: str = "sum",
    ) -> int:
        """Append an rpm-vs-order map: ``amplitude[b, k]`` at band b, order ``orders[k]``.

        Amplitudes in the analyser's unit (m/s²); all-NaN bands (never visited) are skipped.
        One row per map (:func:`~.rows.order_map_row`); returns the number of cells kept.
        """
        row = order_map_row(sensor, axis, rpm_lo, rpm_hi, orders, amplitude)
        self._insert("order_maps", ORDER_MAP_COLUMNS, run_id, [row] if row[2] else [])
        return row[2] * row[3]

    def add_rows(self, run_id: int, rows: RunRows) -> int:
        """Append a run's rows shaped beforehand (:class:`~.rows.RunRows`, e.g. by a fleet
        worker): inserts only, in the open transaction. The run must hold no events yet.
        Returns the number of rows."""
        self._check_run(run_id)
        n = 0
        for a in range(0, len(rows.events), EVENT_BLOCK):
            n += self._insert("events", EVENT_ROW, run_id,
                              rows.events[a:a + EVENT_BLOCK].tolist(), check=False)
        for table, cols, recs in (
                ("windows", WINDOW_COLUMNS, rows.windows),
                ("channels", CHANNEL_ROW, rows.channels),
                ("intervals", INTERVAL_COLUMNS, rows.intervals),
                ("vibration", VIBRATION_COLUMNS, rows.vibration),
                ("order_maps", ORDER_MAP_COLUMNS, rows.order_maps)):
            n += self._insert(table, cols, run_id, recs, check=False)
        self._seq[run_id] = len(rows.events)
        return n

    def _insert(self, table: str, cols: Sequence[str], run_id: int, recs: list[tuple], *,
                check: bool = True) -> int:
        if check:
            self._check_run(run_id)
        if not recs:
            return 0
        # the run id goes into the statement (an int, never text), so each row is bound as
        # shaped: no per-row tuple is built here
        self.db.conn.executemany(
            f"INSERT INTO {table} (run, {', '.join(cols)})"
            f" VALUES ({int(run_id)}, {', '.join('?' * len(cols))})", recs)
        return len(recs)

    def update_run(
        self,
        run_id: int,
        *,
        started_at: datetime | float | str | None = None,
        label: str | None = None,
        notes: str | None = None,
        odometer_km: float | None = None,
    ) -> None:
        """Change a run's descriptive fields (those given); commits."""
        self._check_run(run_id)
        changes = {"label": label, "notes": notes, "odometer_km": odometer_km}
        if started_at is not None:
            changes["started_at"] = utc_iso(started_at)
        for column, value in changes.items():
            if value is not None:
                self.db.execute(f"UPDATE runs SET {column} = ? WHERE id = ?", (value, run_id))
        self.commit()

    def finish_run(self, run_id: int, summary: Mapping | None, status: str = "complete") -> None:
        """Store the run's summary (JSON), set its status and commit."""
        self._check_run(run_id)
        text = json.dumps(jsonable(summary or {}), allow_nan=False, sort_keys=True)
        self.db.execute(
            "UPDATE runs SET summary = ?, status = ? WHERE id = ?", (text, status, run_id)
        )
        self.commit()

    def save_tooth_errors(
        self,
        rig_name: str,
        wheel_key: str,
        errors: Sequence[float],
        *,
        run_id: int | None = None,
        n_revs: int = 0,
        learnt_at: datetime | float | str | None = None,
    ) -> None:
        """Keep a learnt set of tooth spacing errors (degrees per tooth position) and commit."""
        err = np.asarray(errors, dtype=float)
        rms = float(np.sqrt(np.nanmean(err**2))) if err.size and np.isfinite(err).any() else None
        self.db.execute(
            "INSERT INTO tooth_errors (rig, wheel_key, learnt_at, run, errors, rms, n_revs)"
            " VALUES (?, ?, ?, ?, ?, ?, ?)",
            (rig_name, wheel_key, utc_iso(learnt_at), run_id, json.dumps(jsonable(err)), rms,
             int(n_revs)),
        )
        self.commit()
