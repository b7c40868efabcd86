"""Tables of the crankbeat store and the migrations that build them.

The schema version lives in ``schema_version`` (one row). :data:`MIGRATIONS` is an ordered
list of functions; migration ``k`` (0-based) lifts a file from version ``k`` to ``k + 1``.
A new file runs all of them; an old file runs the ones it lacks, each in its own transaction.
Never edit a migration that has shipped: add a new one.
"""

from __future__ import annotations

import hashlib
from collections.abc import Callable

import sqlite_utils

#: Columns of the ``events`` table besides ``run`` and ``seq``, in :data:`dsp.events.EVENT_DTYPE`
#: order. Kept here so the store and the migrations agree on one list.
EVENT_COLUMNS = (
    "t",
    "cycle",
    "cylinder",
    "rpm",
    "throttle",
    "metric",
    "threshold",
    "verdict",
    "confidence",
    "interval_deg",
    "expected_interval_deg",
    "contribution",
)


def _v1(db: sqlite_utils.Database) -> None:
    """First layout: rigs, runs, sources, per-event rows and the per-run summaries."""
    db["schema_version"].create({"version": int}, pk="version")
    db["rigs"].create(
        {"id": int, "name": str, "file_hash": str, "toml": str, "created": str},
        pk="id",
        not_null=["name", "file_hash"],
    )
    db["rigs"].create_index(["name", "file_hash"], unique=True)
    db["runs"].create(
        {
            "id": int,
            "rig_id": int,
            "started_at": str,  # ISO 8601, UTC
            "label": str,
            "notes": str,
            "odometer_km": float,
            "status": str,  # "incomplete" until finish_run, then "complete" (or another word)
            "summary": str,  # JSON
            "created": str,
        },
        pk="id",
        foreign_keys=[("rig_id", "rigs", "id")],
        defaults={"status": "incomplete"},
    )
    db["runs"].create_index(["rig_id", "started_at"])
    db["runs"].create_index(["label"])
    db["runs"].create_index(["odometer_km"])
    db["sources"].create(
        {"id": int, "run": int, "path": str, "sha256": str, "kind": str, "bytes": int},
        pk="id",
        foreign_keys=[("run", "runs", "id")],
    )
    db["sources"].create_index(["run"])
    db["sources"].create_index(["sha256"])
    cols: dict[str, type] = {"run": int, "seq": int}
    for name in EVENT_COLUMNS:
        cols[name] = int if name in ("cycle", "cylinder", "verdict") else float
    db["events"].create(cols, pk=("run", "seq"), foreign_keys=[("run", "runs", "id")])
    db["events"].create_index(["run", "cylinder", "t"])
    db["events"].create_index(["run", "verdict"])
    db["windows"].create(
        {
            "run": int,
            "kind": str,  # "rev200", "rev1000" or "rpm-band"
            "idx": int,  # window number within the run (rev windows)
            "band": str,  # "LO-HI" rpm (rpm-band windows)
            "cylinder": int,  # 0 = all cylinders together
            "t_start": float,
            "t_end": float,
            "events": int,
            "misfires": int,
            "rate": float,  # % of counted events
        },
        foreign_keys=[("run", "runs", "id")],
    )
    db["windows"].create_index(["run", "kind", "cylinder"])
    db["intervals"].create(
        {
            "run": int,
            "from_cyl": int,
            "to_cyl": int,
            "expected_deg": float,
            "observed_deg": float,
            "stderr_deg": float,
            "n": int,
            "flagged": int,
        },
        foreign_keys=[("run", "runs", "id")],
    )
    db["intervals"].create_index(["run"])
    db["vibration"].create(
        {
            "run": int,
            "sensor": str,
            "rpm_lo": float,
            "rpm_hi": float,
            "axis": str,
            "weighting": str,
            "rms": float,
            "n": int,
        },
        foreign_keys=[("run", "runs", "id")],
    )
    db["vibration"].create_index(["run", "sensor", "weighting"])
    db["tooth_errors"].create(
        {
            "id": int,
            "rig": str,
            "wheel_key": str,
            "learnt_at": str,
            "run": int,
            "errors": str,  # JSON list, degrees per tooth position
            "rms": float,
            "n_revs": int,
        },
        pk="id",
    )
    db["tooth_errors"].create_index(["rig", "wheel_key", "learnt_at"])


def source_key(hashes: list[str] | tuple[str, ...] | set[str]) -> str:
    """One key for a set of source-file hashes (order does not matter)."""
    joined = "\n".join(sorted(set(hashes)))
    return hashlib.sha256(joined.encode("ascii")).hexdigest()


def _v2(db: sqlite_utils.Database) -> None:
    """Order maps, and a per-run key over the source hashes for the replay-once check."""
    db["order_map"].create(
        {
            "run": int,
            "sensor": str,
            "axis": str,
            "rpm_lo": float,
            "rpm_hi": float,
            "ord": float,  # engine order (per crank revolution)
            "amplitude": float,
        },
        foreign_keys=[("run", "runs", "id")],
    )
    db["order_map"].create_index(["run", "sensor"])
    db["runs"].add_column("source_key", str)
    # v1 files know their sources only through the sources table: derive the key from it.
    rows = db.execute("SELECT run, sha256 FROM sources ORDER BY run").fetchall()
    by_run: dict[int, list[str]] = {}
    for run, sha in rows:
        by_run.setdefault(run, []).append(sha)
    for run, hashes in by_run.items():
        db.execute("UPDATE runs SET source_key = ? WHERE id = ?", (source_key(hashes), run))
    db["runs"].create_index(["source_key"])


def _v3(db: sqlite_utils.Database) -> None:
    """Events by time within a run: rough-road masking updates them by time span."""
    db["events"].create_index(["run", "t"])


def _v4(db: sqlite_utils.Database) -> None:
    """The analyser version of each run, and the run's status channels (10 Hz, long format)."""
    db["runs"].add_column("analyser", str)  # NULL: a run analysed before versions were kept
    db["runs"].create_index(["source_key", "analyser"])
    db["channels"].create(
        {"run": int, "name": str, "t": float, "value": float},
        foreign_keys=[("run", "runs", "id")],
    )
    db["channels"].create_index(["run", "name", "t"])


def _v5(db: sqlite_utils.Database) -> None:
    """Tags on runs (key=value: bike, build, tyre, fuel ...) for bookkeeping and trend filters."""
    db["run_tags"].create({"run": int, "key": str, "value": str}, pk=("run", "key"),
                          foreign_keys=[("run", "runs", "id")])
    db["run_tags"].create_index(["key", "value"])


def _v6(db: sqlite_utils.Database) -> None:
    """Order maps one row per map (sensor, axis) instead of one per cell: the rpm bands, the
    orders and the amplitudes as little-endian float64 arrays (:mod:`.arrays`), NaN where a
    cell has no value. A minute of ride wrote ~31 000 cell rows, the largest part of a run's
    writing; it is now 4 rows. The cells of older runs move over unchanged."""
    from crankbeat.logger.store.arrays import pack

    db["order_maps"].create(
        {
            "run": int,
            "sensor": str,
            "axis": str,
            "n_bands": int,
            "n_orders": int,
            "rpm_lo": bytes,  # (n_bands,) rpm
            "rpm_hi": bytes,  # (n_bands,) rpm
            "orders": bytes,  # (n_orders,) engine orders (per crank revolution)
            "amplitude": bytes,  # (n_bands, n_orders) row by row, analyser unit (m/s²)
        },
        foreign_keys=[("run", "runs", "id")],
    )
    db["order_maps"].create_index(["run", "sensor"])
    for run, sensor, axis, rows in _old_order_maps(db):
        for lo, hi, orders, amp in _cell_groups(rows):
            db.execute(
                "INSERT INTO order_maps (run, sensor, axis, n_bands, n_orders, rpm_lo, rpm_hi,"
                " orders, amplitude) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (run, sensor, axis, len(lo), len(orders), pack(lo), pack(hi), pack(orders),
                 pack(amp)))
    db["order_map"].drop()


def _old_order_maps(db: sqlite_utils.Database):
    """The cells of the per-cell ``order_map`` table, per (run, sensor, axis), in the order
    they were written."""
    cur = db.execute("SELECT run, sensor, axis, rpm_lo, rpm_hi, ord, amplitude FROM order_map"
                     " ORDER BY run, sensor, axis, rowid")
    key, rows = None, []
    for run, sensor, axis, *cell in cur:
        if (run, sensor, axis) != key:
            if rows:
                yield (*key, rows)
            key, rows = (run, sensor, axis), []
        rows.append(cell)
    if rows:
        yield (*key, rows)


def _cell_groups(rows: list) -> list[tuple[list, list, list, list]]:
    """Cells ``(rpm_lo, rpm_hi, ord, amplitude)`` as maps ``(rpm_lo, rpm_hi, orders, amp)``:
    bands with the same orders (in the order written) go together, so that every cell comes
    back and no cell is made up. NULL becomes NaN."""
    def value(v):
        return float("nan") if v is None else float(v)

    bands: dict[tuple, list] = {}
    for lo, hi, order, amp in rows:
        bands.setdefault((lo, hi), []).append((value(order), value(amp)))
    groups: dict[tuple, tuple[list, list, list, list]] = {}
    for (lo, hi), cells in bands.items():
        orders = [o for o, _ in cells]
        # repr tells NaN orders apart from each other no worse than SQL did, and keys a dict
        group = groups.setdefault(tuple(map(repr, orders)), ([], [], orders, []))
        group[0].append(value(lo))
        group[1].append(value(hi))
        group[3].append([a for _, a in cells])
    return list(groups.values())


MIGRATIONS: list[Callable[[sqlite_utils.Database], None]] = [_v1, _v2, _v3, _v4, _v5, _v6]

#: The version a file has after every migration ran.
SCHEMA_VERSION = len(MIGRATIONS)


def current_version(db: sqlite_utils.Database) -> int:
    """Schema version of an open file (0 for an empty file)."""
    if "schema_version" not in db.table_names():
        return 0
    row = db.execute("SELECT MAX(version) FROM schema_version").fetchone()
    return int(row[0] or 0)


def migrate(db: sqlite_utils.Database, *, target: int = SCHEMA_VERSION) -> list[int]:
    """Bring ``db`` up to ``target``; return the versions it passed through.

    Each step runs in one transaction with its version bump, so a crash mid-way leaves the file
    at the last whole version.
    """
    have = current_version(db)
    done = []
    for version in range(have + 1, target + 1):
        # DDL does not open a transaction by itself in sqlite3: begin one explicitly.
        if not db.conn.in_transaction:
            db.conn.execute("BEGIN")
        try:
            MIGRATIONS[version - 1](db)
            db.execute("DELETE FROM schema_version")
            db.execute("INSERT INTO schema_version (version) VALUES (?)", (version,))
        except BaseException:
            db.conn.rollback()
            raise
        db.conn.commit()
        done.append(version)
    return done
