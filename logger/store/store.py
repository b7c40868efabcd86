"""The :class:`Store`: one SQLite file per test programme (see the package docstring)."""

from __future__ import annotations

import hashlib
import json
import math
import os
import sqlite3
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import asdict, is_dataclass
from datetime import datetime, timezone
from importlib import resources
from pathlib import Path
from typing import Any

import numpy as np
import sqlite_utils

from crankbeat.dsp.events import EVENT_DTYPE, FIRED, MASKED, MISFIRE, VERDICT_NAMES
from crankbeat.errors import RunNotFoundError, StoreError, UsageError
from crankbeat.logger.store.schema import (
    EVENT_COLUMNS,
    SCHEMA_VERSION,
    current_version,
    migrate,
    source_key,
)

_VERDICT_CODES = {name: code for code, name in VERDICT_NAMES.items()}

_WINDOW_COLS = ("kind", "idx", "band", "cylinder", "t_start", "t_end", "events", "misfires", "rate")
_INTERVAL_COLS = (
    "from_cyl", "to_cyl", "expected_deg", "observed_deg", "stderr_deg", "n", "flagged",
)
_VIBRATION_COLS = ("sensor", "rpm_lo", "rpm_hi", "axis", "weighting", "rms", "n")
# Input names that are SQL keywords are stored under a short column name; the others are the
# field names of the dsp results (dsp.analysis.WINDOW_DTYPE, dsp.intervals.IntervalResult).
_ALIASES = {
    "index": "idx", "order": "ord", "counted": "events", "rate_pct": "rate",
    "from_cylinder": "from_cyl", "to_cylinder": "to_cyl", "uncertainty_deg": "stderr_deg",
}
# Fields of those results that are accepted and deliberately not stored.
_NOT_STORED = {"start_cycle", "complete", "spread_deg"}


def sha256_file(path: str | os.PathLike, *, block: int = 1 << 20) -> str:
    """Hex SHA-256 of a file's bytes (the identity of a source file in the store)."""
    h = hashlib.sha256()
    try:
        with open(path, "rb") as f:
            while chunk := f.read(block):
                h.update(chunk)
    except OSError as exc:
        raise StoreError(f"cannot read source file '{path}' to hash it: {exc.strerror}") from None
    return h.hexdigest()


def utc_iso(when: datetime | float | str | None = None) -> str:
    """A time as ISO 8601 UTC text to the second (now when ``when`` is None; floats are epoch s)."""
    if when is None:
        when = datetime.now(timezone.utc)
    elif isinstance(when, str):
        return when
    elif isinstance(when, int | float):
        when = datetime.fromtimestamp(float(when), timezone.utc)
    if when.tzinfo is None:
        when = when.replace(tzinfo=timezone.utc)
    return when.astimezone(timezone.utc).isoformat(timespec="seconds")


def jsonable(obj: Any) -> Any:
    """``obj`` with numpy scalars/arrays, tuples and dataclasses made plain; NaN/inf become None."""
    if is_dataclass(obj) and not isinstance(obj, type):
        obj = asdict(obj)
    if isinstance(obj, Mapping):
        return {str(k): jsonable(v) for k, v in obj.items()}
    if isinstance(obj, np.ndarray):
        return jsonable(obj.tolist())
    if isinstance(obj, list | tuple | set):
        return [jsonable(v) for v in obj]
    if isinstance(obj, np.generic):
        obj = obj.item()
    if isinstance(obj, float) and not math.isfinite(obj):
        return None
    if isinstance(obj, Path):
        return str(obj)
    return obj


def _rig_text(rig: Any) -> str:
    """The rig file's text, so that a run can be understood later without the file."""
    src = str(getattr(rig, "source", "") or "")
    try:
        if src.startswith("preset:"):
            name = src.split(":", 1)[1]
            return (resources.files("crankbeat.logger.presets") / f"{name}.toml").read_text("utf-8")
        if src and Path(src).is_file():
            return Path(src).read_text("utf-8")
    except (OSError, UnicodeDecodeError):
        pass
    return f"# rig source '{src}' was not readable when the run was stored\n"


def _records(rows: Any, columns: Sequence[str], what: str) -> list[tuple]:
    """Rows in any of the shapes the analysers produce, as tuples in ``columns`` order.

    Accepted: a numpy structured array, a mapping of column -> sequence, or an iterable of
    mappings / dataclass instances. Absent columns are NULL; unknown ones are an error, so a
    misspelt field does not vanish silently.
    """
    if isinstance(rows, np.ndarray) and rows.dtype.names:
        cols = {_ALIASES.get(n, n): rows[n].tolist() for n in rows.dtype.names
                if n not in _NOT_STORED}
        return _from_columns(cols, columns, what, len(rows))
    if isinstance(rows, Mapping):
        cols = {_ALIASES.get(k, k): list(np.asarray(v).tolist()) for k, v in rows.items()
                if k not in _NOT_STORED}
        lengths = {len(v) for v in cols.values()}
        if len(lengths) > 1:
            raise StoreError(f"{what}: columns have different lengths {sorted(lengths)}")
        return _from_columns(cols, columns, what, lengths.pop() if lengths else 0)
    out = []
    for i, row in enumerate(rows):
        if is_dataclass(row) and not isinstance(row, type):
            row = asdict(row)
        if not isinstance(row, Mapping):
            raise StoreError(f"{what}: row {i} is a {type(row).__name__}, expected a mapping")
        row = {_ALIASES.get(k, k): v for k, v in row.items() if k not in _NOT_STORED}
        unknown = set(row) - set(columns)
        if unknown:
            raise StoreError(
                f"{what}: row {i} has unknown field(s) {sorted(unknown)}, expected {list(columns)}"
            )
        out.append(tuple(jsonable(row.get(c)) for c in columns))
    return out


def _from_columns(cols: dict, columns: Sequence[str], what: str, n: int) -> list[tuple]:
    unknown = set(cols) - set(columns)
    if unknown:
        raise StoreError(f"{what}: unknown field(s) {sorted(unknown)}, expected {list(columns)}")
    series = [cols.get(c, [None] * n) for c in columns]
    return [tuple(jsonable(v) for v in row) for row in zip(*series, strict=True)]


def _writable(path: Path) -> bool:
    """The file and its folder can be written (SQLite's journal lives beside the file)."""
    return os.access(path, os.W_OK) and os.access(path.parent, os.W_OK)


def _damaged(path: Path, problem: str) -> str:
    return (f"store '{path}' is damaged ({problem.strip()}): nothing is written into it; copy "
            "it and recover the copy with the sqlite3 shell's .recover")


def _connect(path: Path, *, read_only: bool, timeout: float) -> sqlite3.Connection:
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


class Store:
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
        read_only = path.exists() and not _writable(path)
        if read_only and create:
            raise StoreError(f"store '{path}' is read-only (file, folder or mount): runs cannot "
                             "be written into it (queries such as 'crankbeat runs' work)")
        try:
            conn = _connect(path, read_only=read_only, timeout=timeout)
        except sqlite3.Error as exc:
            raise StoreError(f"cannot open store '{path}': {exc}") from None
        store = cls(path, conn)
        store.read_only = read_only
        try:
            store._prepare(check=create)
        except sqlite3.OperationalError as exc:
            conn.close()
            if "locked" in str(exc) or "busy" in str(exc):
                raise StoreError(f"store '{path}' is locked by another program ({exc}); "
                                 "try again when it is done") from None
            raise StoreError(f"cannot open store '{path}': {exc}") from None
        except sqlite3.DatabaseError as exc:
            conn.close()
            if "malformed" in str(exc):
                raise StoreError(_damaged(path, str(exc))) from None
            raise StoreError(f"'{path}' is not a crankbeat store ({exc})") from None
        except BaseException:
            conn.close()
            raise
        return store

    def _prepare(self, *, check: bool) -> None:
        conn = self.db.conn
        # what the file is, before anything is changed in it (not even the journal mode)
        names = self.db.table_names()
        if names and "schema_version" not in names:
            raise StoreError(
                f"'{self.path}' is an SQLite file but not a crankbeat store "
                f"(tables: {', '.join(names[:5])}): left unchanged"
            )
        if names and check:
            try:
                found = "\n".join(r[0] for r in conn.execute("PRAGMA quick_check(5)"))
            except sqlite3.DatabaseError as exc:
                found = str(exc)
            if found != "ok":
                problems = [ln for ln in found.splitlines() if ln and not ln.startswith("***")]
                raise StoreError(_damaged(self.path, problems[0] if problems else found))
        have = current_version(self.db) if names else 0
        if have > SCHEMA_VERSION:
            raise StoreError(
                f"store '{self.path}' has schema version {have}; this crankbeat knows up to "
                f"{SCHEMA_VERSION} (update crankbeat)"
            )
        if self.read_only:
            if have < SCHEMA_VERSION:
                raise StoreError(f"store '{self.path}' is read-only and has the older schema "
                                 f"version {have}: open it once where it can be written")
            return
        conn.execute("PRAGMA journal_mode=WAL")
        conn.execute("PRAGMA foreign_keys=ON")
        migrate(self.db)

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
        text = _rig_text(rig)
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
            params.append(hashlib.sha256(_rig_text(rig).encode("utf-8")).hexdigest())
        if complete:
            where.append("runs.status = 'complete'")
        row = self.db.execute(
            "SELECT runs.id FROM runs JOIN rigs ON rigs.id = runs.rig_id"
            f" WHERE {' AND '.join(where)} ORDER BY runs.id DESC LIMIT 1", params,
        ).fetchone()
        return int(row[0]) if row else None

    def add_channels(self, run_id: int, channels: Mapping[str, tuple]) -> int:
        """Append status-channel rows: ``{name: (t, value)}`` (arrays, s and the channel's unit)."""
        rows = []
        for name, (t, v) in channels.items():
            t, v = np.asarray(t, float), np.asarray(v, float)
            rows += [(run_id, str(name), float(a), None if not math.isfinite(b) else float(b))
                     for a, b in zip(t.tolist(), v.tolist())]
        self.db.conn.executemany(
            "INSERT INTO channels (run, name, t, value) VALUES (?, ?, ?, ?)", rows)
        return len(rows)

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

    def add_events(self, run_id: int, events: np.ndarray) -> int:
        """Append firing events (an array of :data:`dsp.events.EVENT_DTYPE`); return the count.

        One ``executemany`` in the open transaction; call :meth:`commit` to make it durable.
        """
        events = np.asarray(events)
        if events.dtype != EVENT_DTYPE:
            missing = set(EVENT_DTYPE.names or ()) - set(events.dtype.names or ())
            if missing:
                raise StoreError(
                    f"add_events: array lacks field(s) {sorted(missing)} of dsp.events.EVENT_DTYPE"
                )
            # By name: numpy's structured astype would match the fields by position.
            same = np.empty(len(events), dtype=EVENT_DTYPE)
            for name in EVENT_DTYPE.names or ():
                same[name] = events[name]
            events = same
        if run_id not in self._seq:
            self._check_run(run_id)
            row = self.db.execute("SELECT MAX(seq) FROM events WHERE run = ?", (run_id,)).fetchone()
            self._seq[run_id] = -1 if row[0] is None else int(row[0])
            self._seq[run_id] += 1
        start = self._seq[run_id]
        # run and seq go into the array, so one tolist() makes the rows (no per-row Python)
        cols = [("run", np.int64), ("seq", np.int64)]
        cols += [(c, EVENT_DTYPE.fields[c][0]) for c in EVENT_COLUMNS]
        table = np.empty(len(events), dtype=cols)
        table["run"] = run_id
        table["seq"] = np.arange(start, start + len(events))
        for c in EVENT_COLUMNS:
            table[c] = events[c]
        placeholders = ", ".join("?" * (len(EVENT_COLUMNS) + 2))
        self.db.conn.executemany(
            f"INSERT INTO events (run, seq, {', '.join(EVENT_COLUMNS)}) VALUES ({placeholders})",
            table.tolist(),
        )
        self._seq[run_id] = start + len(events)
        return len(events)

    def mask_events(self, run_id: int, spans: Iterable[tuple[float, float]]) -> int:
        """Mark the fired and misfire events of a run inside each ``(t0, t1)`` span "masked".

        Rough-road spans are known only after the events in them were written; unusable and
        fuel-cut events keep their verdict. Returns the number of events changed.
        """
        changed = 0
        for t0, t1 in spans:
            cur = self.db.conn.execute(
                "UPDATE events SET verdict = ? WHERE run = ? AND t >= ? AND t <= ?"
                " AND verdict IN (?, ?)",
                (MASKED, run_id, float(t0), float(t1), FIRED, MISFIRE),
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
        recs = _records(rows, _WINDOW_COLS, "add_windows")
        if kind is not None:
            recs = [(kind, *r[1:]) for r in recs]
        # Rows without a cylinder (the whole-engine windows of dsp.analysis) are cylinder 0.
        recs = [(*r[:3], 0 if r[3] is None else r[3], *r[4:]) for r in recs]
        if recs and all(r[1] is None and r[2] is None for r in recs):
            recs = [(r[0], i, *r[2:]) for i, r in enumerate(recs)]
        bad = {r[0] for r in recs} - {"rev200", "rev1000", "rpm-band"}
        if bad:
            raise StoreError(f"add_windows: unknown kind(s) {sorted(map(str, bad))}, "
                             "expected rev200, rev1000 or rpm-band")
        return self._insert("windows", _WINDOW_COLS, run_id, recs)

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
        return self._insert(
            "intervals", _INTERVAL_COLS, run_id, _records(rows, _INTERVAL_COLS, "add_intervals")
        )

    def add_vibration(self, run_id: int, rows: Any) -> int:
        """Append vibration levels: ``sensor``, ``rpm_lo``, ``rpm_hi`` (rpm), ``axis`` ("x", "y",
        "z" or "sum" for the vector sum), ``weighting`` ("Wh", "Wk", "Wd" or "none"), ``rms``
        (m/s²), ``n`` (samples)."""
        return self._insert(
            "vibration", _VIBRATION_COLS, run_id, _records(rows, _VIBRATION_COLS, "add_vibration")
        )

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
        """
        amp = np.asarray(amplitude, dtype=float)
        lo, hi, orders = (np.asarray(a, dtype=float) for a in (rpm_lo, rpm_hi, orders))
        if amp.shape != (len(lo), len(orders)) or len(hi) != len(lo):
            raise StoreError(
                f"add_order_map: amplitude shape {amp.shape} does not match "
                f"{len(lo)} bands x {len(orders)} orders"
            )
        visited = np.flatnonzero(~np.all(np.isnan(amp), axis=1))
        # NaN (no block of this order in a visited band) is stored as NULL; rows are built
        # column-wise (a map is ~10^4 rows per sensor and axis: a per-cell loop dominated)
        self._check_run(run_id)
        n_ord = len(orders)
        vals = [None if v != v else v
                for v in np.where(np.isfinite(amp[visited]), amp[visited], np.nan).ravel().tolist()]
        self.db.conn.executemany(
            "INSERT INTO order_map (run, sensor, axis, rpm_lo, rpm_hi, ord, amplitude)"
            " VALUES (?, ?, ?, ?, ?, ?, ?)",
            zip([run_id] * len(vals), [sensor] * len(vals), [axis] * len(vals),
                np.repeat(lo[visited], n_ord).tolist(), np.repeat(hi[visited], n_ord).tolist(),
                np.tile(orders, len(visited)).tolist(), vals),
        )
        return len(vals)

    def _insert(self, table: str, cols: Sequence[str], run_id: int, recs: list[tuple]) -> int:
        self._check_run(run_id)
        marks = ", ".join("?" * (len(cols) + 1))
        self.db.conn.executemany(
            f"INSERT INTO {table} (run, {', '.join(cols)}) VALUES ({marks})",
            [(run_id, *r) for r in recs],
        )
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

    # -- reading -------------------------------------------------------------------------
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
            f"{_VERDICT_CODES['misfire']}) AS n_misfires"
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
            f"SELECT {', '.join(_WINDOW_COLS)} FROM windows WHERE {where}"
            " ORDER BY kind, cylinder, idx, band", params))

    def intervals(self, run_id: int) -> list[dict]:
        return list(self.db.query(
            f"SELECT {', '.join(_INTERVAL_COLS)} FROM intervals WHERE run = ? ORDER BY rowid",
            [run_id]))

    def vibration(self, run_id: int) -> list[dict]:
        return list(self.db.query(
            f"SELECT {', '.join(_VIBRATION_COLS)} FROM vibration WHERE run = ?"
            " ORDER BY sensor, weighting, axis, rpm_lo", [run_id]))

    def order_map(self, run_id: int, *, sensor: str | None = None) -> list[dict]:
        where, params = ("run = ?", [run_id]) if sensor is None else ("run = ? AND sensor = ?",
                                                                      [run_id, sensor])
        return list(self.db.query(
            "SELECT sensor, axis, rpm_lo, rpm_hi, ord AS [order], amplitude FROM order_map"
            f" WHERE {where} ORDER BY sensor, axis, rpm_lo, ord", params))

    def cylinder_stats(self, run_id: int) -> list[dict]:
        """Per cylinder: counts per verdict, misfire rate (% of fired + misfire) and mean
        contribution of fired events, from the events; the interval error (deg) of the interval
        ending at the cylinder from the run's interval check (from the events where it has none)."""
        self._check_run(run_id)
        c = _VERDICT_CODES
        sql = (
            "SELECT cylinder, COUNT(*) AS events,"
            f" SUM(verdict = {c['fired']}) AS fired, SUM(verdict = {c['misfire']}) AS misfires,"
            f" SUM(verdict = {c['masked']}) AS masked, SUM(verdict = {c['unusable']}) AS unusable,"
            f" SUM(verdict = {c['fuel_cut']}) AS fuel_cut,"
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
            counted = row["fired"] + row["misfires"]
            row["rate_pct"] = 100.0 * row["misfires"] / counted if counted else None
            if row["cylinder"] in checked:
                row["interval_error_deg"] = checked[row["cylinder"]]
            out.append(row)
        return out

    def trend(self, metric: str, **options: Any) -> list:
        """:func:`logger.store.trend.trend` on this store (same keyword options)."""
        from crankbeat.logger.store.trend import trend

        return trend(self, metric, **options)  # type: ignore[arg-type]


def verdict_code(verdict: str | int) -> int:
    """Verdict code from its name ("misfire") or number."""
    if isinstance(verdict, int | np.integer) and int(verdict) in VERDICT_NAMES:
        return int(verdict)
    text = str(verdict).strip().lower()
    if text.isdigit() and int(text) in VERDICT_NAMES:
        return int(text)
    if text in _VERDICT_CODES:
        return _VERDICT_CODES[text]
    raise UsageError(
        f"unknown verdict {verdict!r}, expected one of {', '.join(_VERDICT_CODES)}"
    )
