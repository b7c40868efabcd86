"""The pieces of ``make bench`` run on a 2-second ride (no timing assertions: speed is the bench's).

Checks are against python-can's own reader, SQLite read directly, the kernel's accounting and
the firing count of a four-stroke twin; each source is named beside its check.
"""

from __future__ import annotations

import json
import sqlite3
import sys
from pathlib import Path

import can
import numpy as np
import pytest

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

from bench import measure, profiling  # noqa: E402
from bench import rides as rides_mod  # noqa: E402
from bench.decode import decode  # noqa: E402
from bench.floors import pycan_iteration, read_split  # noqa: E402
from bench.procs import run_child, script  # noqa: E402
from bench.rides import (  # noqa: E402
    START_TIME,
    RideFiles,
    ensure_ride,
    lap_scenario,
    live_scenario,
    ride_key,
)
from bench.table import Row, failed, render  # noqa: E402
from crankbeat.logger.rig import load_rig  # noqa: E402
from crankbeat.logger.serial.capture import CaptureReader  # noqa: E402
from crankbeat.logger.sim import Scenario, Segment, simulate, write_ride  # noqa: E402

RPM = 10500.0


def _short_scenario() -> Scenario:
    return Scenario(segments=(Segment(2.0, gear=0, rpm=(1300, 1300), throttle=(1.5, 1.5)),),
                    seed=3, name="smoke-2s", start_time=START_TIME, rig="larch")


@pytest.fixture(scope="module")
def rides(tmp_path_factory):
    root = tmp_path_factory.mktemp("rides")
    short = ensure_ride(_short_scenario(), root)  # through the generating child, as the bench
    # the live ride is written in this process: one child fewer for a smoke test
    live_dir = root / "live"
    sim = simulate(load_rig("larch"), live_scenario(2.0, rpm=RPM))
    paths = write_ride(sim, live_dir, stem="ride")
    live = RideFiles(live_dir, paths.can, paths.captures, sim.scenario.duration, 0.0)
    return {"short": short, "live": live, "root": root}


def _pycan_frames(path: Path) -> int:
    with can.LogReader(str(path)) as reader:
        return sum(1 for _ in reader)


def test_rides_are_cached_by_scenario(rides, monkeypatch):
    short = rides["short"]
    assert short.generated_s > 0 and short.can.is_file() and short.duration_s == 2.0
    # the key hashes the simulator's source too, which may change under a running test session
    monkeypatch.setattr(rides_mod, "ride_key", lambda rig, sc: short.folder.name.rsplit("-", 1)[1])
    again = ensure_ride(_short_scenario(), rides["root"])
    assert again.folder == short.folder and again.generated_s == 0.0  # served from the cache
    assert ride_key("larch", lap_scenario(1, seed=5)) != ride_key("larch", lap_scenario(1, seed=6))
    assert lap_scenario(3).duration == 180.0  # one lap is one minute


def test_floors_count_what_python_can_reads(rides):
    ride = rides["short"]
    frames = _pycan_frames(ride.can)  # reference: python-can's own candump reader
    assert frames > 0
    assert pycan_iteration(ride.can).count == frames
    # one frame per line is the candump log format (common practice)
    split = read_split(ride.can, list(ride.captures.values()), repeat=2)
    assert split.count == frames and split.runs == 2


def test_decode_delivers_every_frame_and_sample(rides):
    ride = rides["short"]
    _wall, _cpu, count = decode(load_rig("larch"), ride.can, ride.captures)
    assert count.can_frames == _pycan_frames(ride.can)  # reference: python-can's reader
    # the board runs at 2000 samples/s (docs/rig.md); the aligner may hold none back at the end
    assert count.samples == pytest.approx(2.0 * 2000, abs=40)


def test_replay_child_fills_a_real_store_and_profiles_it(rides, tmp_path):
    ride = rides["short"]
    store, stats = tmp_path / "s.db", tmp_path / "p.pstats"
    argv = [script("bench_replay.py"), "--can", str(ride.can), "--store", str(store),
            "--profile", str(stats)]
    for name, p in ride.captures.items():
        argv += ["--accel", f"{name}={p}"]
    run = run_child(argv, timeout_s=120)
    assert run.ok, run.error
    with sqlite3.connect(store) as db:  # reference: SQLite itself, not the project's Store
        n = db.execute("SELECT COUNT(*) FROM events").fetchone()[0]
    db.close()
    assert run.result["events"] == n
    # a four-stroke twin fires twice per two revolutions (common practice): 1300 rpm for 2 s
    assert 0 < n <= 2.0 * 1300 / 120 * 2 + 2
    names = [p.where for p in profiling.stages(stats)]
    assert any(w.endswith(" analyse_replay") for w in names)
    assert "stages by cumulative time" in profiling.render(stats)


def _peak_child(mib: int):
    code = (f"import json, sys; sys.path.insert(0, {str(ROOT)!r}); "
            "from bench.procs import own_peak_mb; "
            f"b = bytearray({mib} * 2**20); b[::4096] = b'x' * len(b[::4096]); "
            "print(json.dumps({'n': len(b), 'vm_hwm_mb': own_peak_mb()}))")
    run = run_child(["-c", code], timeout_s=60)
    assert run.ok, run.error
    assert run.result["n"] == mib * 2**20
    return run


def test_peak_memory_is_the_childs_own():
    # proc(5): VmHWM is the peak resident set of the process's own address space, in kB; a
    # child that touches 200 MiB has a peak of at least that much
    assert _peak_child(200).peak_rss_mb >= 200.0
    # ... and a child that touches almost nothing stays small even when its parent is big
    # (getrusage's ru_maxrss would report the parent's resident set at fork, on Linux)
    ballast = bytearray(300 * 2**20)
    ballast[::4096] = b"x" * len(ballast[::4096])
    small = _peak_child(1)
    del ballast
    assert small.peak_rss_mb < 100.0


def test_live_run_streams_a_short_ride(rides, tmp_path):
    from bench.live import run_live

    ride = rides["live"]
    figs = run_live(ride.can, ride.captures, tmp_path / "live.db", base=START_TIME,
                    end_settle_s=0.5, tail_s=0.5, timeout_s=120)
    assert figs.child.ok, figs.child.error
    assert figs.child.result["frames_sent"] == _pycan_frames(ride.can)  # python-can's reader
    for name, path in ride.captures.items():
        with CaptureReader(path) as r:
            assert figs.serial_bytes[name] == sum(len(d) for _, d in r.read())
    # a four-stroke twin at 10 500 rpm fires 2 × 10500 / 120 = 175 times a second
    assert 0 < figs.events <= 2.0 * 2 * RPM / 120 + 2
    assert figs.latency_s.size > 0 and np.all(np.isfinite(figs.latency_s))
    assert np.isfinite(figs.cpu_pct)
    # per thread: the feeder (left out of the figure), the serial reader, the main thread
    threads = figs.thread_pct()
    assert any("feeder" in name for name in threads)
    assert any(name.startswith("PortReader(") for name in threads)
    assert any(name.startswith("main") for name in threads)
    feeder = sum(p for name, p in threads.items() if "feeder" in name)
    # the kernel's per-thread ticks and the feeder's own thread_time() agree (10 ms ticks)
    r = figs.child.result
    assert feeder == pytest.approx(100 * r["feeder_cpu_s"] / r["stream_wall_s"], abs=5.0)
    # the analysis's own hold-back is part of the latency (its CAN time, the bus's time.time())
    assert 0 < r["held_p50_ms"] <= r["handed_p50_ms"]
    stages = figs.stage_pct()
    assert stages["analysis, whole step (RunAnalysis.push)"] > 0
    assert stages["store writes and commits"] > 0


def test_rows_judge_targets_and_missing_parts(monkeypatch):
    ceiling = Row("p99", "120 ms", value=120.0, op="<", limit=250.0, unit=" ms")
    floor = Row("rtf", "290x", value=290.0, op=">=", limit=300.0, unit="x")
    info = Row("floor", "4 s", value=4.0)
    assert (ceiling.status, floor.status, info.status) == ("PASS", "MISS", "INFO")
    assert ceiling.ratio == pytest.approx(0.48)
    part = ("crankbeat.logger.not_landed_yet", ("analyse",))
    monkeypatch.setitem(measure.PARTS, "pipeline", part)
    reason = measure.part_missing("pipeline")
    assert "crankbeat.logger.not_landed_yet missing" in reason
    rows = measure._guard(lambda: [info], [("replay", "<", 1.0, "")], reason)
    assert [r.status for r in rows] == ["NOT MEASURED"]
    assert failed([ceiling, floor, info, *rows]) == [floor, rows[0]]
    text = render([ceiling, *rows])
    assert "not measured: crankbeat.logger.not_landed_yet missing" in text
    assert json.dumps([r.as_dict() for r in rows])  # results.json can hold every row
