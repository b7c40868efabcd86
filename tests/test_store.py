"""The SQLite store: schema, round trips, runs, sources, tooth errors, error messages."""

from __future__ import annotations

import json
import sqlite3

import numpy as np
import pytest
import sqlite_utils
from test_store_fill import counts, fill_run, larch_like_rig, make_events

from crankbeat.dsp.events import EVENT_DTYPE, MISFIRE
from crankbeat.errors import RunNotFoundError, StoreError, UsageError
from crankbeat.logger.store import SCHEMA_VERSION, Store, sha256_file

TABLES = {"rigs", "runs", "sources", "events", "windows", "intervals", "vibration", "order_maps",
          "tooth_errors", "schema_version"}


def test_new_store_has_every_table_wal_and_version(tmp_path):
    path = tmp_path / "p.db"
    with Store.open(path) as st:
        assert st.schema_version == SCHEMA_VERSION
    # Read back with plain sqlite3, not through the store.
    conn = sqlite3.connect(path)
    try:
        names = {r[0] for r in conn.execute("SELECT name FROM sqlite_master WHERE type='table'")}
        # SQLite docs (pragma journal_mode): WAL persists in the file once set.
        mode = conn.execute("PRAGMA journal_mode").fetchone()[0]
        indexed = {r[0] for r in conn.execute(
            "SELECT tbl_name FROM sqlite_master WHERE type='index'")}
    finally:
        conn.close()
    assert TABLES <= names
    assert mode == "wal"
    assert {"events", "runs", "windows", "vibration", "order_maps", "sources"} <= indexed


def test_events_round_trip_every_field_and_nan(tmp_path):
    ev = make_events(300)
    with Store.open(tmp_path / "p.db") as st:
        run = st.begin_run(larch_like_rig(), label="a")
        # Two chunks, as the live pipeline writes them.
        st.add_events(run, ev[:101])
        st.add_events(run, ev[101:])
        st.commit()
        back = st.events(run)
    assert back.dtype == EVENT_DTYPE
    for name in EVENT_DTYPE.names:
        # SQLite docs: a NaN REAL is stored as NULL; it must come back as NaN.
        np.testing.assert_array_equal(back[name], ev[name], err_msg=name)
    assert np.isnan(back["interval_deg"][0])


def test_events_seen_by_an_independent_reader_only_after_commit(tmp_path):
    path = tmp_path / "p.db"
    ev = make_events(50)
    st = Store.open(path)
    try:
        run = st.begin_run(larch_like_rig())
        st.add_events(run, ev)
        other = sqlite_utils.Database(path)
        try:
            # begin_run commits the run itself; its events wait for commit().
            assert other["runs"].get(run)["status"] == "incomplete"
            assert other["events"].count_where("run = ?", [run]) == 0
            st.commit()
            assert other["events"].count_where("run = ?", [run]) == len(ev)
        finally:
            other.close()
    finally:
        st.close()


def test_add_events_rejects_a_foreign_array(tmp_path):
    bad = np.zeros(3, dtype=[("t", "f8"), ("cylinder", "i2")])
    with Store.open(tmp_path / "p.db") as st:
        run = st.begin_run(larch_like_rig())
        with pytest.raises(StoreError, match="lacks field"):
            st.add_events(run, bad)
        with pytest.raises(RunNotFoundError):
            st.add_events(run + 99, make_events(2))


def test_cylinder_stats_match_a_slow_count(tmp_path):
    ev = make_events(1000, misfire_every={2: 50, 1: 200})
    with Store.open(tmp_path / "p.db") as st:
        run = fill_run(st, ev)
        stats = {c["cylinder"]: c for c in st.cylinder_stats(run)}
    for cyl in (1, 2):
        mis, counted = counts(ev, cyl)
        assert stats[cyl]["misfires"] == mis
        assert stats[cyl]["fired"] + stats[cyl]["misfires"] == counted
        assert stats[cyl]["rate_pct"] == pytest.approx(100.0 * mis / counted)
    # make_events: 2 masked, 1 unusable, 1 fuel cut, all on cylinder 1
    assert (stats[1]["masked"], stats[1]["unusable"], stats[1]["fuel_cut"]) == (2, 1, 1)
    assert stats[2]["misfires"] == 1000 // 50


def test_finish_run_stores_plain_json(tmp_path):
    summary = {"rate": np.float64(1.5), "n": np.int64(3), "bad": float("nan"),
               "arr": np.arange(3), "nested": {"t": (1.0, float("inf"))}}
    with Store.open(tmp_path / "p.db") as st:
        run = st.begin_run(larch_like_rig())
        st.finish_run(run, summary)
    reader = sqlite_utils.Database(tmp_path / "p.db")
    try:
        raw = reader["runs"].get(run)["summary"]
    finally:
        reader.close()
    # json.loads with the default parser rejects nothing here; NaN/inf became null (RFC 8259
    # has no NaN).
    assert json.loads(raw) == {"rate": 1.5, "n": 3, "bad": None, "arr": [0, 1, 2],
                               "nested": {"t": [1.0, None]}}
    assert "NaN" not in raw and "Infinity" not in raw


def test_find_run_by_sources_matches_the_whole_set_in_any_order(tmp_path):
    with Store.open(tmp_path / "p.db") as st:
        run = st.begin_run(larch_like_rig(), sources=[("a.log", "aa", "can"),
                                                   ("b.acraw", "bb", "accel:bar_left")])
        assert st.find_run_by_sources(["bb", "aa"]) is None  # not complete yet: not a match
        st.finish_run(run, {})
        assert st.find_run_by_sources(["bb", "aa"]) == run
        assert st.find_run_by_sources(["aa"]) is None
        assert st.find_run_by_sources(["aa", "bb", "cc"]) is None
        again = st.begin_run(larch_like_rig(), sources=[("a.log", "aa"), ("b.acraw", "bb")])
        st.finish_run(again, {})
        assert st.find_run_by_sources(["aa", "bb"]) == again  # the newest
        interrupted = st.begin_run(larch_like_rig(), sources=[("a.log", "aa"), ("b.acraw", "bb")])
        st.finish_run(interrupted, {}, status="interrupted")
        assert st.find_run_by_sources(["aa", "bb"]) == again  # an interrupted run is no match


def test_sources_record_size_and_hash(tmp_path):
    f = tmp_path / "ride.log"
    f.write_bytes(b"abc")
    # FIPS 180-2 appendix B.1 test vector: SHA-256("abc").
    assert sha256_file(f) == "ba7816bf8f01cfea414140de5dae2223b00361a396177a9cb410ff61f20015ad"
    with Store.open(tmp_path / "p.db") as st:
        run = st.begin_run(larch_like_rig(), sources=[(str(f), sha256_file(f), "can")])
        (src,) = st.run(run)["sources"]
    assert src["bytes"] == 3 and src["kind"] == "can"


def test_rig_text_is_kept_once_per_version(tmp_path):
    with Store.open(tmp_path / "p.db") as st:
        a = st.begin_run(larch_like_rig())
        b = st.begin_run(larch_like_rig())
        text = st.rig_toml(a)
        assert st.db["rigs"].count == 1
        assert st.rig_toml(b) == text
    assert 'name = "larch"' in text and "misfire_alert_pct" in text  # logger/presets/larch.toml


def test_tooth_errors_latest_wins(tmp_path):
    with Store.open(tmp_path / "p.db") as st:
        assert st.load_tooth_errors("larch", "60-2") is None
        st.save_tooth_errors("larch", "60-2", [0.1, -0.1, 0.0], n_revs=100,
                             learnt_at="2026-01-01T00:00:00+00:00")
        st.save_tooth_errors("larch", "60-2", [0.2, np.nan, -0.2], n_revs=200,
                             learnt_at="2026-02-01T00:00:00+00:00")
        st.save_tooth_errors("larch", "36-1", [9.0], learnt_at="2026-03-01T00:00:00+00:00")
        got = st.load_tooth_errors("larch", "60-2")
        rms = st.db.execute("SELECT rms FROM tooth_errors ORDER BY id LIMIT 1").fetchone()[0]
    np.testing.assert_array_equal(got, [0.2, np.nan, -0.2])
    assert rms == pytest.approx(np.sqrt((0.01 + 0.01) / 3))  # rms definition


def test_summary_rows_in_every_accepted_shape(tmp_path):
    arr = np.zeros(2, dtype=[("index", "i8"), ("cylinder", "i8"), ("events", "i8"),
                             ("misfires", "i8"), ("rate", "f8")])
    arr["index"], arr["cylinder"], arr["events"], arr["misfires"] = [0, 1], 1, 400, [4, 0]
    arr["rate"] = [1.0, 0.0]
    with Store.open(tmp_path / "p.db") as st:
        run = st.begin_run(larch_like_rig())
        st.add_windows(run, arr, kind="rev200")
        st.add_windows(run, {"kind": ["rpm-band"], "band": ["5000-5500"], "cylinder": [0],
                             "events": [10], "misfires": [1], "rate": [10.0]})
        st.add_intervals(run, [{"from_cyl": 1, "to_cyl": 2, "expected_deg": 270.0,
                                "observed_deg": 270.4, "stderr_deg": 0.1, "n": 99,
                                "flagged": 0}])
        st.add_order_map(run, sensor="bar_left", rpm_lo=[5000, 5500], rpm_hi=[5500, 6000],
                         orders=[0.5, 1.0, 1.5], amplitude=[[0.1, 2.0, 0.3],
                                                            [np.nan] * 3])
        with pytest.raises(StoreError, match="unknown field"):
            st.add_intervals(run, [{"from_cyl": 1, "to": 2}])
        with pytest.raises(StoreError, match="unknown kind"):
            st.add_windows(run, arr, kind="rev300")
        with pytest.raises(StoreError, match="does not match"):
            st.add_order_map(run, sensor="x", rpm_lo=[0], rpm_hi=[1], orders=[1, 2],
                             amplitude=[[1.0]])
        st.commit()
        w200 = st.windows(run, kind="rev200")
        band = st.windows(run, kind="rpm-band")
        om = st.order_map(run)
        iv = st.intervals(run)
    assert [(w["idx"], w["misfires"], w["rate"]) for w in w200] == [(0, 4, 1.0), (1, 0, 0.0)]
    assert band[0]["band"] == "5000-5500" and band[0]["rate"] == 10.0
    assert [r["order"] for r in om] == [0.5, 1.0, 1.5]  # the never-visited band is left out
    assert iv[0]["observed_deg"] == 270.4


def test_resolve_run_by_id_label_and_last(tmp_path):
    with Store.open(tmp_path / "p.db") as st:
        with pytest.raises(RunNotFoundError, match="no run with events yet"):
            st.resolve_run("last")
        a = st.begin_run(larch_like_rig(), label="warm-up")
        b = st.begin_run(larch_like_rig(), label="dup")
        c = st.begin_run(larch_like_rig(), label="dup")
        assert st.resolve_run(str(a)) == a
        assert st.resolve_run("warm-up") == a
        # "last" is the newest run holding events: a failed replay (no events) is passed over
        with pytest.raises(RunNotFoundError, match="no run with events yet"):
            st.resolve_run("last")
        st.add_events(b, make_events(20))
        assert st.resolve_run("last") == b
        with pytest.raises(RunNotFoundError, match=f"runs {b}, {c}"):
            st.resolve_run("dup")
        with pytest.raises(RunNotFoundError, match="'nope'") as info:
            st.resolve_run("nope")
        assert info.value.exit_code == 5  # dsp/errors.py: store errors exit 5
        with pytest.raises(RunNotFoundError, match="no run 42"):
            st.resolve_run("42")
        with pytest.raises(UsageError, match="unknown verdict"):
            st.events(a, verdict="exploded")


def test_open_errors_are_one_line(tmp_path):
    with pytest.raises(StoreError, match="no store file") as info:
        Store.open(tmp_path / "missing.db", create=False)
    assert "\n" not in str(info.value)
    with pytest.raises(StoreError, match="folder .* is missing"):
        Store.open(tmp_path / "nodir" / "x.db")
    junk = tmp_path / "junk.db"
    junk.write_bytes(b"this is not sqlite at all" * 100)
    with pytest.raises(StoreError, match="not a crankbeat store"):
        Store.open(junk)
    other = tmp_path / "other.db"
    db = sqlite_utils.Database(other)
    db["cats"].insert({"name": "x"})
    db.close()
    with pytest.raises(StoreError, match="not a crankbeat store .*cats"):
        Store.open(other)


def test_newer_schema_is_refused(tmp_path):
    path = tmp_path / "p.db"
    Store.open(path).close()
    conn = sqlite3.connect(path)
    with conn:
        conn.execute("UPDATE schema_version SET version = ?", (SCHEMA_VERSION + 1,))
    conn.close()
    with pytest.raises(StoreError, match=f"schema version {SCHEMA_VERSION + 1}"):
        Store.open(path)


def test_misfire_verdict_filter(tmp_path):
    ev = make_events(400, misfire_every={2: 10})
    with Store.open(tmp_path / "p.db") as st:
        run = fill_run(st, ev)
        mis = st.events(run, verdict="misfire")
        two = st.events(run, cylinder=2)
    assert len(mis) == 40 and set(mis["verdict"].tolist()) == {MISFIRE}
    assert set(two["cylinder"].tolist()) == {2} and len(two) == 400


def test_dsp_results_are_stored_as_they_come(tmp_path):
    """window_rates and interval_check output go in without reshaping (real dsp functions)."""
    from crankbeat.dsp.analysis import window_rates
    from crankbeat.dsp.intervals import interval_check

    rig = larch_like_rig()
    ev = make_events(1500, misfire_every={2: 10}, interval_offset={2: 1.0}, special=False)
    windows, per_cyl = window_rates(ev, revolutions=1000, engine=rig.engine)
    results = interval_check(ev, rig.engine, tolerance_deg=3.0)
    with Store.open(tmp_path / "p.db") as st:
        run = st.begin_run(rig)
        st.add_window_rates(run, "rev1000", windows, per_cyl)
        st.add_intervals(run, results)
        st.commit()
        whole = [w for w in st.windows(run, kind="rev1000") if w["cylinder"] == 0]
        cyl2 = [w for w in st.windows(run, kind="rev1000") if w["cylinder"] == 2]
        iv = {(i["from_cyl"], i["to_cyl"]): i for i in st.intervals(run)}
    # 1000 revolutions of a 4-stroke = 500 cycles (common practice) -> 3 windows of 1000 events
    assert [w["events"] for w in whole] == [1000, 1000, 1000]
    assert [w["misfires"] for w in whole] == [50, 50, 50]
    assert [w["idx"] for w in cyl2] == [0, 1, 2]
    assert all(w["rate"] == pytest.approx(10.0) for w in cyl2)  # every 10th cycle, arithmetic
    # docs/rig.md: 270 deg from cylinder 1 to 2; the synthetic offset of +1 deg is seen
    assert iv[(1, 2)]["expected_deg"] == 270.0
    assert iv[(1, 2)]["observed_deg"] == pytest.approx(271.0, abs=0.1)
    assert iv[(2, 1)]["observed_deg"] == pytest.approx(450.0, abs=0.1)


def test_mask_events_changes_only_judged_events_inside_spans(tmp_path):
    ev = make_events(100, misfire_every={2: 10})
    ev["verdict"][[45, 47, 70]] = 5  # partial burns: judged events too
    with Store.open(tmp_path / "p.db") as st:
        run = fill_run(st, ev)
        t0, t1 = float(ev["t"][40]), float(ev["t"][60])
        inside = (ev["t"] >= t0) & (ev["t"] <= t1)
        judged = inside & np.isin(ev["verdict"], (0, 1, 5))
        changed = st.mask_events(run, [(t0, t1)])
        st.commit()
        back = st.events(run)
        plan = st.db.execute(
            "EXPLAIN QUERY PLAN UPDATE events SET verdict = 2 WHERE run = 1 AND t >= 0 "
            "AND t <= 1 AND verdict IN (0, 1)").fetchall()
    assert changed == int(judged.sum()) == 21
    assert (back["verdict"][judged] == 2).all()
    np.testing.assert_array_equal(back["verdict"][~judged], ev["verdict"][~judged])
    assert "idx_events_run_t" in " ".join(str(r) for r in plan)  # SQLite uses the time index


def test_update_run_fields(tmp_path):
    with Store.open(tmp_path / "p.db") as st:
        run = st.begin_run(larch_like_rig(), label="a", started_at="2026-01-01T00:00:00+00:00")
        # 1767225600 s after the Unix epoch is 2026-01-01T00:00:00Z (date arithmetic)
        st.update_run(run, started_at=1767225600.0 + 86400.0, notes="wet")
        info = st.run(run)
    assert info["started_at"] == "2026-01-02T00:00:00+00:00"
    assert info["notes"] == "wet" and info["label"] == "a"


def test_a_store_locked_by_another_program(tmp_path):
    path = tmp_path / "p.db"
    Store.open(path).close()
    holder = sqlite3.connect(path)
    try:
        holder.execute("PRAGMA locking_mode=EXCLUSIVE")
        # SQLite docs (locking_mode): an exclusive transaction keeps every other reader out.
        holder.execute("BEGIN EXCLUSIVE")
        with pytest.raises(StoreError, match="locked by another program") as info:
            Store.open(path, timeout=0.1)
    finally:
        holder.rollback()
        holder.close()
    assert info.value.exit_code == 5


def test_add_events_matches_fields_by_name(tmp_path):
    ev = make_events(20)
    names = list(reversed(EVENT_DTYPE.names))
    shuffled = np.empty(len(ev), dtype=[(n, EVENT_DTYPE[n]) for n in names])
    for n in names:
        shuffled[n] = ev[n]
    with Store.open(tmp_path / "p.db") as st:
        run = st.begin_run(larch_like_rig())
        st.add_events(run, shuffled)
        back = st.events(run)
    for n in EVENT_DTYPE.names:
        np.testing.assert_array_equal(back[n], ev[n], err_msg=n)
