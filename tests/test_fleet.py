"""Fleet re-analysis: a batch over the fixture rides equals replaying them one by one, whatever
the backend (a local process pool, a real Dask LocalCluster with 2 worker processes on
loopback) or the order results come back in; a failing ride is reported and the batch goes on;
a batch started again skips what is done; re-analysis keeps earlier analyser versions."""

from __future__ import annotations

import pickle
from pathlib import Path

import numpy as np
import pytest

from crankbeat.logger.cli.main import main
from crankbeat.logger.fleet.batch import run_batch
from crankbeat.logger.fleet.local import LocalPool
from crankbeat.logger.fleet.rides import rides_from_paths, rides_from_store
from crankbeat.logger.rig import load_rig
from crankbeat.logger.run.drive import analyse_files
from crankbeat.logger.run.output import Priors
from crankbeat.logger.run.writer import store_output
from crankbeat.logger.store import Store

ROOT = Path(__file__).resolve().parent.parent
FIX = ROOT / "fixtures"
#: the Larch's rides among the fixtures (fixtures/README.md)
LARCH_RIDES = [FIX / "demo", FIX / "blf" / "blf.blf", FIX / "mismatch-360"]


@pytest.fixture(scope="module")
def rig():
    return load_rig("larch")


@pytest.fixture(scope="module")
def one_by_one(rig):
    """Each ride replayed alone (same priors as the batch: none, a new store)."""
    if not (FIX / "demo" / "demo.log").is_file():
        pytest.skip("fixtures are missing (make fixtures)")
    out = {}
    for ride in rides_from_paths([str(p) for p in LARCH_RIDES], rig):
        out[Path(ride.can).name] = analyse_files(rig, ride.can, ride.accel, priors=Priors())
    return out


@pytest.fixture(scope="module")
def replayed(rig, tmp_path_factory):
    """Each ride through the replay path the CLI takes (analyse_replay), into a store of its
    own: everything a run stores, per CAN file name."""
    from crankbeat.logger.pipeline import analyse_replay

    if not (FIX / "demo" / "demo.log").is_file():
        pytest.skip("fixtures are missing (make fixtures)")
    out = {}
    for ride in rides_from_paths([str(p) for p in LARCH_RIDES], rig):
        db = tmp_path_factory.mktemp("one") / "one.db"
        with Store.open(db) as store:
            analyse_replay(rig, ride.can, ride.accel, store)
        out.update(_stored_runs(db))
    return out


def _stored_runs(db: Path) -> dict[str, dict]:
    """Per CAN file name: every row the run stored (ids, dates and the analyser left out)."""
    with Store.open(db) as store:
        got = {}
        for r in store.runs():
            rid = r["id"]
            summary = dict(r["summary"] or {})
            got[Path(store.run(rid)["sources"][0]["path"]).name] = {
                "events": store.events(rid), "windows": store.windows(rid),
                "intervals": store.intervals(rid), "vibration": store.vibration(rid),
                "order_map": store.order_map(rid), "channels": store.channels(rid),
                "summary": summary, "started_at": r["started_at"]}
        return got


def _assert_same_runs(got: dict[str, dict], want: dict[str, dict]) -> None:
    assert set(got) == set(want)
    for name, run in got.items():
        ref = want[name]
        for col in ref["events"].dtype.names:
            np.testing.assert_array_equal(run["events"][col], ref["events"][col],
                                          err_msg=f"{name} {col}")
        for key in ("windows", "intervals", "vibration", "order_map", "summary", "started_at"):
            assert run[key] == ref[key], f"{name}: {key} differ"
        assert set(run["channels"]) == set(ref["channels"]) != set(), name
        for ch, (t, v) in run["channels"].items():
            np.testing.assert_array_equal(t, ref["channels"][ch][0])
            np.testing.assert_array_equal(v, ref["channels"][ch][1])


def test_batch_in_any_order_stores_what_replaying_one_by_one_stores(rig, replayed, tmp_path):
    # every stored row, not only the events; the rides handed out in reverse order
    rides = rides_from_paths([str(p) for p in LARCH_RIDES], rig)[::-1]
    db = tmp_path / "rev.db"
    with Store.open(db) as store, LocalPool(2) as engine:
        report = run_batch(store, rides, engine)
    assert len(report.stored) == 3 and not report.failed
    _assert_same_runs(_stored_runs(db), replayed)


def _stored_events(db: Path) -> dict[str, np.ndarray]:
    with Store.open(db) as store:
        return {Path(store.run(r["id"])["sources"][0]["path"]).name: store.events(r["id"])
                for r in store.runs()}


def _assert_same(stored: dict[str, np.ndarray], expected: dict) -> None:
    assert set(stored) == set(expected)
    for name, ev in stored.items():
        want = expected[name].events
        assert len(ev) == len(want) > 0, name
        for col in ev.dtype.names:
            np.testing.assert_array_equal(ev[col], want[col], err_msg=f"{name} {col}")


def test_pairing_finds_the_capture_of_the_demo_ride(rig):
    rides = {Path(r.can).name: r for r in rides_from_paths([str(p) for p in LARCH_RIDES], rig)}
    assert set(rides) == {"demo.log", "blf.blf", "mismatch-360.log"}
    assert rides["demo.log"].accel == {"bar_left": FIX / "demo" / "demo.bar_left.acraw"}
    assert rides["blf.blf"].accel == {}


def test_run_output_survives_pickling(one_by_one):
    out = one_by_one["demo.log"]
    back = pickle.loads(pickle.dumps(out))
    for col in out.events.dtype.names:
        np.testing.assert_array_equal(back.events[col], out.events[col], err_msg=col)
    assert back.summary == out.summary and set(back.channels) == set(out.channels)


def test_stored_order_maps_read_back_equal_the_analysis_output(rig, one_by_one, tmp_path):
    out = one_by_one["demo.log"]
    assert out.tail.order_maps  # the demo ride has an accelerometer
    with Store.open(tmp_path / "o.db") as store:
        run = store_output(store, rig, out, save_teeth=False)
        back = {(m["sensor"], m["axis"]): m for m in store.order_maps(run)}
        cells = store.order_map(run)
    assert set(back) == {(m["sensor"], m["axis"]) for m in out.tail.order_maps}
    n_cells = 0
    for m in out.tail.order_maps:
        got = back[(m["sensor"], m["axis"])]
        visited = ~np.all(np.isnan(m["amplitude"]), axis=1)  # bands never visited: not stored
        assert 0 < visited.sum() < len(visited)
        # bit for bit, NaN where the analysis has no value
        np.testing.assert_array_equal(got["amplitude"], m["amplitude"][visited])
        np.testing.assert_array_equal(got["rpm_lo"], np.asarray(m["rpm_lo"])[visited])
        np.testing.assert_array_equal(got["rpm_hi"], np.asarray(m["rpm_hi"])[visited])
        np.testing.assert_array_equal(got["orders"], m["orders"])
        n_cells += m["amplitude"][visited].size
    # the cell view holds the same numbers, one row per visited band and order
    assert len(cells) == n_cells
    first = out.tail.order_maps[0]
    b = int(np.flatnonzero(~np.all(np.isnan(first["amplitude"]), axis=1))[0])
    row = [c for c in cells if (c["sensor"], c["axis"]) == (first["sensor"], first["axis"])
           and c["rpm_lo"] == first["rpm_lo"][b]]
    want = [None if np.isnan(v) else v for v in first["amplitude"][b].tolist()]
    assert [c["amplitude"] for c in row] == want


def test_local_pool_batch_equals_one_by_one_and_goes_on_after_a_bad_ride(
        rig, one_by_one, tmp_path):
    bad = tmp_path / "bad.log"
    bad.write_text("this is not a CAN log\n")
    rides = rides_from_paths([str(p) for p in LARCH_RIDES] + [str(bad)], rig)
    lines = []
    db = tmp_path / "pool.db"
    with Store.open(db) as store, LocalPool(2) as engine:
        report = run_batch(store, rides, engine,
                           progress=lambda done, total, line: lines.append((done, total, line)))
    assert set(report.failed) == {str(bad)} and "line 1" in report.failed[str(bad)]
    assert len(report.stored) == 3
    assert [d for d, _, _ in lines] == [1, 2, 3, 4] and all(t == 4 for _, t, _ in lines)
    _assert_same(_stored_events(db), one_by_one)
    # started again: everything done is skipped, nothing new is stored
    with Store.open(db) as store, LocalPool(1) as engine:
        again = run_batch(store, rides, engine)
        assert len(store.runs()) == 3
    assert set(again.skipped) == set(report.stored) and not again.stored


@pytest.fixture(scope="module")
def dask_client():
    """A real LocalCluster: 2 worker processes on loopback. Module-wide, so that Dask's own
    process-wide helper thread (started on first use, kept for the process) exists before the
    tests' thread-leak guard looks."""
    distributed = pytest.importorskip("distributed")
    import logging

    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None,
                                  silence_logs=logging.WARNING) as cluster, \
            distributed.Client(cluster) as client:
        client.submit(sum, [1, 2], pure=False).result()  # warm: every helper thread is up
        yield client


def test_dask_local_cluster_batch_equals_one_by_one(rig, one_by_one, dask_client, tmp_path):
    from crankbeat.logger.fleet.dask_engine import DaskEngine

    rides = rides_from_paths([str(p) for p in LARCH_RIDES], rig)
    db = tmp_path / "dask.db"
    assert len(dask_client.scheduler_info()["workers"]) == 2
    with Store.open(db) as store, DaskEngine(client=dask_client) as engine:
        report = run_batch(store, rides, engine)
    assert len(report.stored) == 3 and not report.failed
    _assert_same(_stored_events(db), one_by_one)


def test_reanalysis_keeps_the_older_version_and_queries_pick_the_newest(
        rig, one_by_one, tmp_path):
    db = tmp_path / "v.db"
    old = one_by_one["blf.blf"]
    old.analyser, saved = "0.0.9+r0", old.analyser  # as an earlier analyser stored it
    try:
        with Store.open(db) as store:
            old_id = store_output(store, rig, old, label="blf")
    finally:
        old.analyser = saved
    with Store.open(db) as store:
        rides, gone = rides_from_store(store)
        assert len(rides) == 1 and not gone
        with LocalPool(1) as engine:
            report = run_batch(store, rides, engine)
        (new_id,) = report.stored.values()
        assert new_id != old_id
        assert [r["analyser"] for r in store.runs()] == ["0.0.9+r0", saved]
        assert store.resolve_run("blf") == new_id  # the label names the newest analysis
        assert store.resolve_run("blf@0.0.9+r0") == old_id
        assert {p.run_id for p in store.trend("misfire_rate")} == {new_id}
        assert {p.run_id for p in store.trend("misfire_rate", analyser="0.0.9+r0")} == {old_id}
        # the new run names the same rig text as the old one (kept beside the store)
        assert store.rig_toml(new_id) == store.rig_toml(old_id)


def test_batch_command_on_a_folder(tmp_path, capsys):
    db = tmp_path / "c.db"
    argv = ["batch", "--rig", "larch", "--store", str(db), "--workers", "1",
            str(FIX / "blf" / "blf.blf")]
    assert main(argv) == 0
    out, err = capsys.readouterr()
    assert "1 stored, 0 skipped" in out and "[1/1] stored" in err
    assert main(argv) == 0
    assert "0 stored, 1 skipped" in capsys.readouterr()[0]
    assert main(["batch", "--store", str(db)]) == 2  # neither rides nor --stored


def test_bench_fleet_child_times_a_batch(tmp_path):
    # the helper behind `make bench`'s fleet rows, on the 2 s BLF fixture (no timing judged)
    import sys

    sys.path.insert(0, str(ROOT))
    from bench.procs import run_child, script

    run = run_child([script("bench_fleet.py"), "--rides", str(FIX / "blf"), "--store",
                     str(tmp_path / "b.db"), "--workers", "1"])
    assert run.ok, run.error
    assert run.result["rides"] == run.result["stored"] == 1 and run.result["failed"] == 0
    assert run.result["seconds"] > 0 and run.result["worker_cpu_s"] > 0


def _dies_on_blf(index, ride, priors):
    """A worker's task that ends its process on the BLF ride, as an out-of-memory kill would."""
    import os

    from crankbeat.logger.fleet.task import analyse_ride

    if Path(ride.can).suffix == ".blf":
        os._exit(3)
    return analyse_ride(index, ride, priors)


def test_a_worker_that_dies_fails_its_ride_only(rig, one_by_one, tmp_path):
    rides = rides_from_paths([str(p) for p in LARCH_RIDES], rig)
    db = tmp_path / "dies.db"
    with Store.open(db) as store, LocalPool(2, task=_dies_on_blf) as engine:
        report = run_batch(store, rides, engine)
    blf = next(r.name for r in rides if r.can.suffix == ".blf")
    assert set(report.failed) == {blf} and "worker process" in report.failed[blf]
    assert len(report.stored) == 2
    stored = _stored_events(db)
    _assert_same(stored, {k: v for k, v in one_by_one.items() if k in stored})


def test_batch_command_on_a_dask_scheduler_and_the_default_pool(dask_client, tmp_path, capsys):
    # --scheduler connects to a running cluster by address (here the LocalCluster's); without
    # it and without --workers the local pool takes every core this process may use
    import os

    from crankbeat.logger.fleet.engine import make_engine

    db = tmp_path / "s.db"
    address = dask_client.scheduler.address
    assert main(["batch", "--rig", "larch", "--store", str(db), "--scheduler", address,
                 str(FIX / "blf" / "blf.blf")]) == 0
    out = capsys.readouterr().out
    assert "1 stored, 0 skipped" in out
    with Store.open(db) as store:
        assert len(store.runs()) == 1 and store.events(store.runs()[0]["id"]).size > 0
    with make_engine() as engine:
        assert engine.workers == len(os.sched_getaffinity(0))
    assert main(["batch", "--rig", "larch", "--store", str(db), "--scheduler",
                 "tcp://127.0.0.1:9", str(FIX / "blf" / "blf.blf")]) == 4
    assert "no Dask scheduler at 'tcp://127.0.0.1:9'" in capsys.readouterr().err


def test_stored_rides_whose_files_are_gone_are_left_out_and_named(rig, one_by_one, tmp_path):
    import shutil

    moved = tmp_path / "moved.blf"
    shutil.copy(FIX / "blf" / "blf.blf", moved)
    with Store.open(tmp_path / "g.db") as store:
        kept = store_output(store, rig, one_by_one["demo.log"], label="demo")
        from crankbeat.logger.pipeline import analyse_replay

        gone_id = analyse_replay(rig, moved, {}, store).run_id
        moved.unlink()  # the recording was moved away after its analysis
        rides, gone = rides_from_store(store)
    assert [r.name for r in rides] == [f"run {kept}"]
    assert gone == [f"run {gone_id}: input file(s) gone: {moved}"]
