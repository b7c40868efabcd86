"""Migrating a schema-v1 file (as crankbeat's first schema wrote it) to the current version."""

from __future__ import annotations

import sqlite3

import numpy as np

from crankbeat.dsp.events import EVENT_DTYPE
from crankbeat.logger.store import SCHEMA_VERSION, Store
from crankbeat.logger.store.schema import source_key

# Frozen copy of the v1 layout (logger/store/schema.py `_v1` as first shipped). It stays as it
# is when the schema moves on: that is the point of the test.
V1_DDL = """
CREATE TABLE "schema_version" ("version" INTEGER PRIMARY KEY);
CREATE TABLE "rigs" ("id" INTEGER PRIMARY KEY, "name" TEXT NOT NULL, "file_hash" TEXT NOT NULL,
  "toml" TEXT, "created" TEXT);
CREATE UNIQUE INDEX "idx_rigs_name_file_hash" ON "rigs" ("name", "file_hash");
CREATE TABLE "runs" ("id" INTEGER PRIMARY KEY, "rig_id" INTEGER REFERENCES "rigs"("id"),
  "started_at" TEXT, "label" TEXT, "notes" TEXT, "odometer_km" REAL,
  "status" TEXT DEFAULT 'incomplete', "summary" TEXT, "created" TEXT);
CREATE INDEX "idx_runs_rig_id_started_at" ON "runs" ("rig_id", "started_at");
CREATE INDEX "idx_runs_label" ON "runs" ("label");
CREATE INDEX "idx_runs_odometer_km" ON "runs" ("odometer_km");
CREATE TABLE "sources" ("id" INTEGER PRIMARY KEY, "run" INTEGER REFERENCES "runs"("id"),
  "path" TEXT, "sha256" TEXT, "kind" TEXT, "bytes" INTEGER);
CREATE INDEX "idx_sources_run" ON "sources" ("run");
CREATE INDEX "idx_sources_sha256" ON "sources" ("sha256");
CREATE TABLE "events" ("run" INTEGER REFERENCES "runs"("id"), "seq" INTEGER, "t" REAL,
  "cycle" INTEGER, "cylinder" INTEGER, "rpm" REAL, "throttle" REAL, "metric" REAL,
  "threshold" REAL, "verdict" INTEGER, "confidence" REAL, "interval_deg" REAL,
  "expected_interval_deg" REAL, "contribution" REAL, PRIMARY KEY ("run", "seq"));
CREATE INDEX "idx_events_run_cylinder_t" ON "events" ("run", "cylinder", "t");
CREATE INDEX "idx_events_run_verdict" ON "events" ("run", "verdict");
CREATE TABLE "windows" ("run" INTEGER REFERENCES "runs"("id"), "kind" TEXT, "idx" INTEGER,
  "band" TEXT, "cylinder" INTEGER, "t_start" REAL, "t_end" REAL, "events" INTEGER,
  "misfires" INTEGER, "rate" REAL);
CREATE TABLE "intervals" ("run" INTEGER REFERENCES "runs"("id"), "from_cyl" INTEGER,
  "to_cyl" INTEGER, "expected_deg" REAL, "observed_deg" REAL, "stderr_deg" REAL, "n" INTEGER,
  "flagged" INTEGER);
CREATE TABLE "vibration" ("run" INTEGER REFERENCES "runs"("id"), "sensor" TEXT, "rpm_lo" REAL,
  "rpm_hi" REAL, "axis" TEXT, "weighting" TEXT, "rms" REAL, "n" INTEGER);
CREATE TABLE "tooth_errors" ("id" INTEGER PRIMARY KEY, "rig" TEXT, "wheel_key" TEXT,
  "learnt_at" TEXT, "run" INTEGER, "errors" TEXT, "rms" REAL, "n_revs" INTEGER);
INSERT INTO schema_version VALUES (1);
INSERT INTO rigs VALUES (1, 'larch', 'f00d', '[rig]\nname = "larch"\n',
  '2026-01-01T00:00:00+00:00');
INSERT INTO runs VALUES (1, 1, '2026-01-02T08:00:00+00:00', 'old-ride', 'dry', 1200.0,
  'complete', '{"x": 1}', '2026-01-02T09:00:00+00:00');
INSERT INTO sources VALUES (1, 1, 'old.log', 'aaaa', 'can', 10);
INSERT INTO sources VALUES (2, 1, 'old.bar_left.acraw', 'bbbb', 'accel:bar_left', 20);
INSERT INTO events VALUES (1, 0, 0.5, 0, 1, 3000.0, 20.0, 0.1, 1.0, 0, 0.9, NULL, 450.0, 1.0);
INSERT INTO events VALUES (1, 1, 0.52, 0, 2, 3000.0, 20.0, 2.5, 1.0, 1, 0.8, 270.5, 270.0, 0.1);
"""


def _v1_file(path):
    conn = sqlite3.connect(path)
    conn.executescript(V1_DDL)
    conn.commit()
    conn.close()


def test_v1_file_migrates_and_keeps_its_data(tmp_path):
    path = tmp_path / "old.db"
    _v1_file(path)
    with Store.open(path) as st:
        assert st.schema_version == SCHEMA_VERSION
        assert "order_maps" in st.db.table_names()
        assert "source_key" in st.db["runs"].columns_dict
        # The replay-once key was derived from the v1 sources table.
        assert st.find_run_by_sources(["bbbb", "aaaa"]) == 1
        run = st.run(1)
        ev = st.events(1)
    assert run["label"] == "old-ride" and run["summary"] == {"x": 1}
    assert run["odometer_km"] == 1200.0
    assert ev.dtype == EVENT_DTYPE and len(ev) == 2
    assert np.isnan(ev["interval_deg"][0]) and ev["verdict"][1] == 1


def test_migrated_file_takes_new_runs_and_reopens_unchanged(tmp_path):
    path = tmp_path / "old.db"
    _v1_file(path)
    Store.open(path).close()
    conn = sqlite3.connect(path)
    ddl_before = sorted(r[0] for r in conn.execute("SELECT sql FROM sqlite_master") if r[0])
    conn.close()
    with Store.open(path) as st:  # second open: nothing left to migrate
        from test_store_fill import larch_like_rig, make_events

        run = st.begin_run(larch_like_rig(), sources=[("n.log", "cccc")])
        st.add_events(run, make_events(20))
        st.add_order_map(run, sensor="bar_left", rpm_lo=[3000], rpm_hi=[3500], orders=[1.0],
                         amplitude=[[0.4]])
        st.commit()
        assert st.db.execute("SELECT source_key FROM runs WHERE id = ?",
                             (run,)).fetchone()[0] == source_key(["cccc"])
        assert len(st.events(run)) == 40
    conn = sqlite3.connect(path)
    ddl_after = sorted(r[0] for r in conn.execute("SELECT sql FROM sqlite_master") if r[0])
    version = conn.execute("SELECT version FROM schema_version").fetchall()
    conn.close()
    assert ddl_after == ddl_before
    assert version == [(SCHEMA_VERSION,)]


def test_v1_ddl_is_what_the_first_migration_builds(tmp_path):
    """Guards the frozen copy: migration 1 alone must build exactly these tables and columns."""
    import sqlite_utils

    from crankbeat.logger.store.schema import migrate

    fresh = sqlite_utils.Database(tmp_path / "fresh.db")
    migrate(fresh, target=1)
    frozen = tmp_path / "frozen.db"
    _v1_file(frozen)
    ref = sqlite_utils.Database(frozen)
    try:
        assert set(fresh.table_names()) == set(ref.table_names())
        for name in ref.table_names():
            assert fresh[name].columns_dict == ref[name].columns_dict, name
    finally:
        fresh.close()
        ref.close()


# The per-cell order map of schema versions 2 to 5, written as that version's add_order_map did:
# one row per visited band and order, NaN and inf as NULL, never-visited bands left out.
OLD_CELL_SQL = ("INSERT INTO order_map (run, sensor, axis, rpm_lo, rpm_hi, ord, amplitude)"
                " VALUES (?, ?, ?, ?, ?, ?, ?)")
OLD_READ_SQL = ("SELECT sensor, axis, rpm_lo, rpm_hi, ord AS [order], amplitude FROM order_map"
                " WHERE run = ? ORDER BY sensor, axis, rpm_lo, ord")


def _old_cells(run, sensor, axis, lo, hi, orders, amp):
    amp = np.asarray(amp, dtype=float)
    for b in range(len(lo)):
        if np.all(np.isnan(amp[b])):
            continue
        for k, order in enumerate(orders):
            v = float(amp[b, k])
            yield (run, sensor, axis, float(lo[b]), float(hi[b]), float(order),
                   v if np.isfinite(v) else None)


def test_v5_per_cell_order_maps_migrate_and_read_back_the_same(tmp_path):
    import sqlite_utils

    from crankbeat.logger.figures import order_grid
    from crankbeat.logger.store.schema import migrate

    path = tmp_path / "v5.db"
    db = sqlite_utils.Database(path)
    migrate(db, target=5)
    db.execute("INSERT INTO rigs (id, name, file_hash, toml) VALUES (1, 'larch', 'f00d', '')")
    for run in (1, 2):
        db.execute("INSERT INTO runs (id, rig_id, status) VALUES (?, 1, 'complete')", (run,))
    orders = np.arange(0.0, 3.01, 0.5)
    lo, hi = np.array([1000.0, 1500.0, 2000.0]), np.array([1500.0, 2000.0, 2500.0])
    rng = np.random.default_rng(3)
    amp = rng.random((3, orders.size))
    amp[1] = np.nan  # a band never visited
    amp[2, 1], amp[2, 2], amp[0, 3] = np.nan, np.inf, 0.0  # no value, not finite, zero
    cells = list(_old_cells(1, "bar_left", "sum", lo, hi, orders, amp))
    cells += _old_cells(1, "bar_left", "x", lo, hi, orders, amp / 2)
    # a second map of the same sensor and axis with other orders (two writes of one run)
    cells += _old_cells(1, "bar_left", "x", [3000.0], [3500.0], [1.0, 2.0], [[0.7, 0.8]])
    cells += _old_cells(2, "seat", "z", lo[:1], hi[:1], orders[:2], [[0.1, 0.2]])
    db.conn.executemany(OLD_CELL_SQL, cells)
    db.conn.commit()
    want = {run: [dict(zip(("sensor", "axis", "rpm_lo", "rpm_hi", "order", "amplitude"), r))
                  for r in db.execute(OLD_READ_SQL, (run,)).fetchall()] for run in (1, 2)}
    db.close()
    assert len(want[1]) == 2 * 2 * orders.size + 2 and len(want[2]) == 2

    with Store.open(path) as st:
        assert st.schema_version == SCHEMA_VERSION
        assert "order_map" not in st.db.table_names()
        for run in (1, 2):
            assert st.order_map(run) == want[run]
        assert st.db.execute("SELECT COUNT(*) FROM order_maps").fetchone()[0] == 4
        (m,) = [m for m in st.order_maps(1) if m["axis"] == "sum"]
        np.testing.assert_array_equal(m["rpm_lo"], [1000.0, 2000.0])
        np.testing.assert_array_equal(m["orders"], orders)
        kept = np.where(np.isfinite(amp[[0, 2]]), amp[[0, 2]], np.nan)
        np.testing.assert_array_equal(m["amplitude"], kept)
        grid = order_grid(st, 1, "bar_left", "sum", max_order=8.0)
    # the grid reads the migrated map: the unvisited band stays empty, zero and no-value too
    assert grid["amplitude"][0, 1] == amp[0, 1] and np.isnan(grid["amplitude"][1]).all()
    assert np.isnan(grid["amplitude"][0, 3]) and np.isnan(grid["amplitude"][2, 2])
