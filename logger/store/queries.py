"""The reading side of a store: runs, their rows, channels and per-cylinder figures.

:class:`RunQueries` is mixed into :class:`~crankbeat.logger.store.Store`; it needs the store's
``db`` (an ``sqlite_utils.Database``) and ``path``.
"""

from __future__ import annotations

import hashlib
import json
from collections.abc import Iterable
from typing import Any

import numpy as np
import sqlite_utils

from crankbeat.dsp.events import EVENT_DTYPE
from crankbeat.errors import RunNotFoundError
from crankbeat.logger.store.arrays import unpack
from crankbeat.logger.store.records import (
    INTERVAL_COLUMNS,
    VERDICT_CODES,
    VIBRATION_COLUMNS,
    WINDOW_COLUMNS,
    rig_text,
    verdict_code,
)
from crankbeat.logger.store.rows import ORDER_MAP_COLUMNS
from crankbeat.logger.store.schema import EVENT_COLUMNS, source_key


class RunQueries:
    """Queries on a store's runs (no writes)."""

    db: sqlite_utils.Database

    def find_run_by_sources(self, hashes: Iterable[str], *, analyser: str | None = None,
                            rig: Any = None, complete: bool = True) -> int | None:
        """The newest run analysed from exactly this set of source files, or None.

        ``analyser``: only runs of that analyser version; ``rig``: only runs analysed with this
        very rig text; ``complete``: only finished runs (default: a run that was interrupted, or
        is still being written, does not count, so the files are analysed again).
        """
        hashes = list(hashes)
        if not hashes:
            return None
        where, params = ["runs.source_key = ?"], [source_key(hashes)]
        if analyser is not None:
            where.append("runs.analyser = ?")
            params.append(analyser)
        if rig is not None:
            where.append("rigs.file_hash = ?")
            params.append(hashlib.sha256(rig_text(rig).encode("utf-8")).hexdigest())
        if complete:
            where.append("runs.status = 'complete'")
        row = self.db.execute(
            "SELECT runs.id FROM runs JOIN rigs ON rigs.id = runs.rig_id"
            f" WHERE {' AND '.join(where)} ORDER BY runs.id DESC LIMIT 1", params,
        ).fetchone()
        return int(row[0]) if row else None

    def channels(self, run_id: int, *, names: Iterable[str] | None = None
                 ) -> dict[str, tuple[np.ndarray, np.ndarray]]:
        """The run's status channels, ``{name: (t, value)}`` in time order (NaN for a gap)."""
        self._check_run(run_id)
        rows = self.db.execute(
            "SELECT name, t, value FROM channels WHERE run = ? ORDER BY name, t", (run_id,)
        ).fetchall()
        want = None if names is None else set(names)
        grouped: dict[str, list] = {}
        for name, t, v in rows:
            if want is None or name in want:
                grouped.setdefault(name, []).append((t, np.nan if v is None else v))
        return {n: (np.array([r[0] for r in g], float), np.array([r[1] for r in g], float))
                for n, g in grouped.items()}

    def _check_run(self, run_id: int) -> None:
        if self.db.execute("SELECT 1 FROM runs WHERE id = ?", (run_id,)).fetchone() is None:
            raise RunNotFoundError(f"no run {run_id} in store '{self.path}'")

    def load_tooth_errors(self, rig_name: str, wheel_key: str) -> np.ndarray | None:
        """The most recently learnt tooth errors for this rig and wheel (None if never learnt)."""
        row = self.db.execute(
            "SELECT errors FROM tooth_errors WHERE rig = ? AND wheel_key = ?"
            " ORDER BY learnt_at DESC, id DESC LIMIT 1",
            (rig_name, wheel_key),
        ).fetchone()
        if row is None:
            return None
        return np.array([np.nan if v is None else v for v in json.loads(row[0])], dtype=float)

    def resolve_run(self, spec: int | str) -> int:
        """Run id from an id, a label or "last" (the newest run holding events).

        A label shared by re-analyses of one ride (same source files) names the newest of
        them; ``LABEL@ANALYSER`` names the one of that analyser version.
        """
        text = str(spec).strip()
        if "@" in text and not text.isdigit():
            from crankbeat.logger.store.versions import resolve_versioned

            return resolve_versioned(self, text)
        if text == "last":
            from crankbeat.logger.store.labels import last_run

            return last_run(self)
        if text.isdigit():
            run_id = int(text)
            self._check_run(run_id)
            return run_id
        ids = [r[0] for r in self.db.execute("SELECT id FROM runs WHERE label = ?", (text,))]
        if not ids:
            raise RunNotFoundError(
                f"no run with id or label '{text}' in store '{self.path}' (see 'crankbeat runs')"
            )
        if len(ids) > 1:
            from crankbeat.logger.store.versions import newest_analysis

            newest = newest_analysis(self, ids)
            if newest is not None:
                return newest
            raise RunNotFoundError(
                f"label '{text}' names runs {', '.join(map(str, ids))}: give the run id"
            )
        return int(ids[0])

    def run(self, run_id: int) -> dict:
        """One run as a dict: id, rig, started_at, label, notes, odometer_km, status, summary,
        created, sources (list of dicts)."""
        rows = self._run_rows("WHERE runs.id = ?", (run_id,))
        if not rows:
            raise RunNotFoundError(f"no run {run_id} in store '{self.path}'")
        info = rows[0]
        info["sources"] = list(
            self.db.query(
                "SELECT path, sha256, kind, bytes FROM sources WHERE run = ? ORDER BY id", [run_id]
            )
        )
        return info

    def runs(self, *, rig: str | None = None) -> list[dict]:
        """Every run (oldest first), optionally of one rig, with its event and misfire counts."""
        where, params = ("WHERE rigs.name = ?", (rig,)) if rig else ("", ())
        return self._run_rows(where, params)

    def _run_rows(self, where: str, params: tuple) -> list[dict]:
        sql = (
            "SELECT runs.id, rigs.name AS rig, runs.started_at, runs.label, runs.notes,"
            " runs.odometer_km, runs.status, runs.summary, runs.created, runs.analyser,"
            " (SELECT COUNT(*) FROM events e WHERE e.run = runs.id) AS n_events,"
            f" (SELECT COUNT(*) FROM events e WHERE e.run = runs.id AND e.verdict = "
            f"{VERDICT_CODES['misfire']}) AS n_misfires"
            f" FROM runs JOIN rigs ON rigs.id = runs.rig_id {where} ORDER BY runs.id"
        )
        out = []
        for row in self.db.query(sql, list(params)):
            row["summary"] = json.loads(row["summary"]) if row["summary"] else None
            out.append(row)
        return out

    def rig_toml(self, run_id: int) -> str:
        """The rig file text the run was analysed with."""
        row = self.db.execute(
            "SELECT rigs.toml FROM runs JOIN rigs ON rigs.id = runs.rig_id WHERE runs.id = ?",
            (run_id,),
        ).fetchone()
        if row is None:
            raise RunNotFoundError(f"no run {run_id} in store '{self.path}'")
        return row[0]

    def events(
        self,
        run_id: int,
        *,
        cylinder: int | None = None,
        verdict: str | int | None = None,
    ) -> np.ndarray:
        """The run's events as an :data:`EVENT_DTYPE` array in the order they were stored."""
        self._check_run(run_id)
        where, params = ["run = ?"], [run_id]
        if cylinder is not None:
            where.append("cylinder = ?")
            params.append(int(cylinder))
        if verdict is not None:
            where.append("verdict = ?")
            params.append(verdict_code(verdict))
        rows = self.db.execute(
            f"SELECT {', '.join(EVENT_COLUMNS)} FROM events WHERE {' AND '.join(where)}"
            " ORDER BY seq",
            params,
        ).fetchall()
        out = np.zeros(len(rows), dtype=EVENT_DTYPE)
        if rows:
            for name, col in zip(EVENT_COLUMNS, zip(*rows, strict=True), strict=True):
                # SQLite keeps NaN as NULL; numpy turns None back into NaN for float columns.
                out[name] = np.array(col, dtype=float if EVENT_DTYPE[name].kind == "f" else None)
        return out

    def windows(self, run_id: int, *, kind: str | None = None) -> list[dict]:
        where, params = ("run = ?", [run_id]) if kind is None else ("run = ? AND kind = ?",
                                                                    [run_id, kind])
        return list(self.db.query(
            f"SELECT {', '.join(WINDOW_COLUMNS)} FROM windows WHERE {where}"
            " ORDER BY kind, cylinder, idx, band", params))

    def intervals(self, run_id: int) -> list[dict]:
        return list(self.db.query(
            f"SELECT {', '.join(INTERVAL_COLUMNS)} FROM intervals WHERE run = ? ORDER BY rowid",
            [run_id]))

    def vibration(self, run_id: int) -> list[dict]:
        return list(self.db.query(
            f"SELECT {', '.join(VIBRATION_COLUMNS)} FROM vibration WHERE run = ?"
            " ORDER BY sensor, weighting, axis, rpm_lo", [run_id]))

    def order_maps(self, run_id: int, *, sensor: str | None = None) -> list[dict]:
        """The run's order maps as arrays, one dict per stored map (by sensor, axis): ``sensor``,
        ``axis``, ``rpm_lo``, ``rpm_hi`` (n_b,) rpm of the visited bands, ``orders`` (n_o,),
        ``amplitude`` (n_b, n_o) m/s², NaN where a cell has no value."""
        where, params = ("run = ?", [run_id]) if sensor is None else ("run = ? AND sensor = ?",
                                                                      [run_id, sensor])
        rows = self.db.execute(
            f"SELECT {', '.join(ORDER_MAP_COLUMNS)} FROM order_maps WHERE {where}"
            " ORDER BY sensor, axis, rowid", params).fetchall()
        return [{"sensor": s, "axis": a, "rpm_lo": unpack(lo, n_b), "rpm_hi": unpack(hi, n_b),
                 "orders": unpack(orders, n_o), "amplitude": unpack(amp, (n_b, n_o))}
                for s, a, n_b, n_o, lo, hi, orders, amp in rows]

    def order_map(self, run_id: int, *, sensor: str | None = None) -> list[dict]:
        """The run's order maps cell by cell: ``sensor``, ``axis``, ``rpm_lo``, ``rpm_hi``,
        ``order``, ``amplitude`` (None: no value), by sensor, axis, rpm_lo and order (the
        rows of the per-cell table of schema versions 2 to 5)."""
        cells = []
        for m in self.order_maps(run_id, sensor=sensor):
            n_b, n_o = m["amplitude"].shape
            cells += zip([m["sensor"]] * (n_b * n_o), [m["axis"]] * (n_b * n_o),
                         *(_nullable(np.repeat(m[k], n_o)) for k in ("rpm_lo", "rpm_hi")),
                         _nullable(np.tile(m["orders"], n_b)), _nullable(m["amplitude"].ravel()))
        # SQL's order (NULL first); the sort is stable, so ties keep the order written
        cells.sort(key=lambda c: (c[0], c[1], c[2] is not None, c[2] or 0.0,
                                  c[4] is not None, c[4] or 0.0))
        keys = ("sensor", "axis", "rpm_lo", "rpm_hi", "order", "amplitude")
        return [dict(zip(keys, c)) for c in cells]

    def cylinder_stats(self, run_id: int) -> list[dict]:
        """Per cylinder: counts per verdict, misfire rate (% of the counted events: fired,
        partial, misfire) and mean contribution of fired events, from the events; the interval
        error (deg) of the interval ending at the cylinder from the run's interval check (from
        the events where it has none)."""
        self._check_run(run_id)
        c = VERDICT_CODES
        sql = (
            "SELECT cylinder, COUNT(*) AS events,"
            f" SUM(verdict = {c['fired']}) AS fired, SUM(verdict = {c['misfire']}) AS misfires,"
            f" SUM(verdict = {c['masked']}) AS masked, SUM(verdict = {c['unusable']}) AS unusable,"
            f" SUM(verdict = {c['fuel_cut']}) AS fuel_cut,"
            f" SUM(verdict = {c['partial']}) AS partial,"
            f" AVG(CASE WHEN verdict = {c['fired']} THEN contribution END) AS contribution,"
            f" AVG(CASE WHEN verdict IN ({c['fired']}, {c['misfire']})"
            "  THEN interval_deg - expected_interval_deg END) AS interval_error_deg"
            " FROM events WHERE run = ? GROUP BY cylinder ORDER BY cylinder"
        )
        # the run's interval check is the considered figure (it starts where a tooth-error
        # correction learnt mid-run took effect): the interval ending at each cylinder
        checked = {r["to_cyl"]: r["observed_deg"] - r["expected_deg"]
                   for r in self.intervals(run_id)
                   if r["observed_deg"] is not None and r["expected_deg"] is not None}
        out = []
        for row in self.db.query(sql, [run_id]):
            counted = row["fired"] + row["partial"] + row["misfires"]
            row["rate_pct"] = 100.0 * row["misfires"] / counted if counted else None
            if row["cylinder"] in checked:
                row["interval_error_deg"] = checked[row["cylinder"]]
            out.append(row)
        return out

    def trend(self, metric: str, **options: Any) -> list:
        """:func:`logger.store.trend.trend` on this store (same keyword options)."""
        from crankbeat.logger.store.trend import trend

        return trend(self, metric, **options)  # type: ignore[arg-type]


def _nullable(values: np.ndarray) -> list:
    """Floats with NaN as None (how SQL gave back a missing value)."""
    return [None if v != v else v for v in values.tolist()]
