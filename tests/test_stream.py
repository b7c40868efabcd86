"""The one stream interface: replay and live give the same chunks from the same data."""

from __future__ import annotations

import dataclasses
import socket
import threading
import time
from pathlib import Path

import can
import numpy as np
import pytest
from conftest import larch_frames, larch_serial

import crankbeat.logger.stream as stream_mod
from crankbeat.errors import FormatError, SourceError, UsageError
from crankbeat.logger.can.decode import FrameDecoder
from crankbeat.logger.can.sources import open_log
from crankbeat.logger.rig.model import CanBus
from crankbeat.logger.serial.capture import CaptureReader, CaptureWriter
from crankbeat.logger.serial.decoder import SerialDecoder
from crankbeat.logger.stream import live, replay

FIX = Path(__file__).resolve().parent.parent / "fixtures"
DEMO_LOG = FIX / "demo" / "demo.log"
needs_demo = pytest.mark.skipif(not DEMO_LOG.exists(), reason="fixtures/demo not generated")


def _cat(chunks, part, name):
    if part == "accel":
        return np.concatenate([getattr(c.accel["bar_left"], name) for c in chunks])
    block = [getattr(c, part) for c in chunks]
    if part == "status":
        return np.concatenate([b.values[name] if name != "t" else b.t for b in block])
    return np.concatenate([getattr(b, name) for b in block])


def assert_same_chunks(a, b, *, accel=True):
    assert len(a) == len(b)
    assert [c.end_time for c in a] == [c.end_time for c in b]
    for ca, cb in zip(a, b, strict=True):
        for f in dataclasses.fields(ca.teeth):
            np.testing.assert_array_equal(getattr(ca.teeth, f.name), getattr(cb.teeth, f.name))
        np.testing.assert_array_equal(ca.status.t, cb.status.t)
        assert ca.status.values.keys() == cb.status.values.keys()
        for r in ca.status.values:
            np.testing.assert_array_equal(ca.status.values[r], cb.status.values[r])
        if accel:
            assert ca.accel.keys() == cb.accel.keys()
            for s in ca.accel:
                for f in ("t", "xyz", "gap_before"):
                    np.testing.assert_array_equal(getattr(ca.accel[s], f),
                                                  getattr(cb.accel[s], f))


def _write_ride(tmp_path, rig, seconds=2.0):
    log = tmp_path / "r.log"
    with can.Logger(str(log)) as w:
        for m in larch_frames(rig, seconds=seconds, extra_ids=True):
            w.on_message_received(m)
    acc = tmp_path / "r.acraw"
    with CaptureWriter(acc) as w:
        for t, b in larch_serial(rig, seconds=seconds):
            w.write(t, b)
    return log, acc


def _replay(rig, log, acc=None, **kw):
    with replay(rig, log, {"bar_left": acc} if acc else None, **kw) as s:
        return list(s)


# ----------------------------------------------------------------------------- replay
def test_chunks_sit_on_whole_multiples_and_lose_nothing(tmp_path, larch):
    log, acc = _write_ride(tmp_path, larch)
    chunks = _replay(larch, log, acc, chunk_s=0.25)
    prev = -np.inf
    for c in chunks:
        k = c.end_time / 0.25
        assert k == pytest.approx(round(k), abs=1e-6)  # a whole multiple of chunk_s
        assert (c.teeth.frame_time < c.end_time).all() and (c.teeth.frame_time >= prev).all()
        assert (c.status.t < c.end_time).all()
        prev = c.end_time
    # nothing lost or doubled at the boundaries: the same as one decoder over the whole log
    dec = FrameDecoder(larch)
    with open_log(log) as src:
        blocks = [dec.push(b) for b in src.batches()]
    np.testing.assert_array_equal(_cat(chunks, "teeth", "periods"),
                                  np.concatenate([b[0].periods for b in blocks]))
    np.testing.assert_array_equal(_cat(chunks, "status", "engine_speed"),
                                  np.concatenate([b[1].values["engine_speed"] for b in blocks]))
    # the accelerometer: the serial decoder fed everything at once, then flushed
    sd = SerialDecoder(larch.sensor("bar_left"))
    with CaptureReader(acc) as r:
        whole = [sd.push(r.read()), sd.flush()]
    np.testing.assert_array_equal(_cat(chunks, "accel", "t"),
                                  np.concatenate([w.t for w in whole]))
    np.testing.assert_array_equal(_cat(chunks, "accel", "xyz"),
                                  np.concatenate([w.xyz for w in whole]))
    assert chunks[-1].health.serial_good["bar_left"] == 4000
    assert chunks[-1].health.can_unknown_id > 0


def test_batching_does_not_change_the_chunks(tmp_path, larch, monkeypatch):
    log, acc = _write_ride(tmp_path, larch)
    ref = _replay(larch, log, acc)
    monkeypatch.setattr(stream_mod, "BATCH_FRAMES", 37)
    assert_same_chunks(_replay(larch, log, acc), ref)
    assert_same_chunks(_replay(larch, log, acc, fast=False), ref)  # python-can's reader


@needs_demo
def test_demo_fast_and_python_can_paths_agree(larch):
    fast = _replay(larch, DEMO_LOG)
    slow = _replay(larch, DEMO_LOG, fast=False)
    assert_same_chunks(fast, slow)
    assert len(fast) > 100 and sum(len(c.teeth) for c in fast) > 50_000


def test_progress_and_health_snapshots(tmp_path, larch):
    log, acc = _write_ride(tmp_path, larch, seconds=1.0)
    with replay(larch, log, {"bar_left": acc}) as s:
        seen = []
        for c in s:
            seen.append((s.progress, c.health.can_frames))
        done, total = s.progress
    assert total == log.stat().st_size and done == total
    frames = [h for _, h in seen]
    assert frames == sorted(frames) and frames[-1] == len(larch_frames(larch, seconds=1.0,
                                                                    extra_ids=True))


def test_paced_replay_gives_the_same_chunks(tmp_path, larch):
    log, acc = _write_ride(tmp_path, larch, seconds=0.4)
    assert_same_chunks(_replay(larch, log, acc, pace=50.0), _replay(larch, log, acc))


def test_bad_arguments_are_usage_errors(tmp_path, larch):
    log, acc = _write_ride(tmp_path, larch, seconds=0.2)
    with pytest.raises(UsageError, match="no serial sensor 'seat'"):
        replay(larch, log, {"seat": acc})
    with pytest.raises(UsageError, match="chunk_s must be a positive number of seconds, got 0"):
        replay(larch, log, chunk_s=0)
    with pytest.raises(UsageError, match="pace"):
        replay(larch, log, pace=-1)
    with pytest.raises(SourceError, match="cannot open capture file"):
        replay(larch, log, {"bar_left": tmp_path / "none.acraw"})


def test_random_bytes_log_fails_in_one_line_and_closes(tmp_path, larch):
    junk = tmp_path / "junk.log"
    junk.write_bytes(np.random.default_rng(7).integers(0, 256, 3000, dtype=np.uint8).tobytes())
    with pytest.raises(FormatError) as e:
        _replay(larch, junk)
    msg = str(e.value)
    assert msg.startswith(f"{junk}: line 1: not a candump log") and "\n" not in msg


def test_a_log_of_another_rig_is_noted(tmp_path, larch):
    from crankbeat.logger.rig import load_rig

    log, _ = _write_ride(tmp_path, larch, seconds=0.3)
    chunks = _replay(load_rig("alder"), log)
    notes = chunks[-1].health.notes
    assert any("is this the right rig for this log?" in n for n in notes)
    assert sum(len(c.teeth) for c in chunks) == 0


# ----------------------------------------------------------------------------- live
class _SerialServer:
    """A TCP server on 127.0.0.1 that a pyserial ``socket://`` URL connects to."""

    def __init__(self) -> None:
        self.sock = socket.socket()
        self.sock.bind(("127.0.0.1", 0))
        self.sock.listen(1)
        self.url = f"socket://127.0.0.1:{self.sock.getsockname()[1]}"
        self.conn: socket.socket | None = None

    def accept(self) -> None:
        self.sock.settimeout(10)
        self.conn, _ = self.sock.accept()

    def close(self) -> None:
        if self.conn is not None:
            self.conn.close()
        self.sock.close()


def _feed(bus_channel, server, msgs, reads, t_base, done, errors):
    """Send CAN frames and serial reads at their times relative to the first (wall clock);
    set ``done`` (which stops the live run) when everything is out."""
    sender = can.Bus(interface="virtual", channel=bus_channel)
    try:
        server.accept()
        events = [(m.timestamp - t_base, 0, m) for m in msgs]
        events += [(t - t_base, 1, b) for t, b in reads]
        events.sort(key=lambda e: (e[0], e[1]))
        wall0 = time.monotonic()
        for rel, kind, item in events:
            wait = wall0 + rel - time.monotonic()
            if wait > 0:
                time.sleep(wait)
            if kind == 0:
                sender.send(item)
            else:
                server.conn.sendall(item)
        time.sleep(0.4)  # let the last bytes arrive before the run is stopped
    except Exception as exc:  # noqa: BLE001 - reported by the test
        errors.append(exc)
    finally:
        sender.shutdown()
        done.set()


def test_live_recorded_then_replayed_gives_identical_chunks(tmp_path, larch, monkeypatch):
    # under load a serial read may reach the queue late; widen the margin for the test
    monkeypatch.setattr(stream_mod, "LIVE_SERIAL_MARGIN_S", 0.3)
    from crankbeat.logger.sim import Scenario, Segment, can_messages, serial_chunks, simulate

    seconds = 1.2
    ride = simulate(larch, Scenario(segments=(Segment(seconds, gear=2, rpm=(3000, 3500),
                                                   throttle=(20, 30)),), seed=3))
    msgs = list(can_messages(ride))
    reads = list(serial_chunks(ride, "bar_left"))
    t_base = min(msgs[0].timestamp, reads[0][0])
    channel = f"crankbeat-live-{id(tmp_path)}"
    server = _SerialServer()
    done, errors = threading.Event(), []
    feeder = threading.Thread(target=_feed, name="feeder",
                              args=(channel, server, msgs, reads, t_base, done, errors))
    live_chunks = []
    try:
        with live(larch, CanBus(interface="virtual", channel=channel), {"bar_left": server.url},
                  record_dir=tmp_path / "rec", record_stem="run", stop=done) as s:
            feeder.start()
            live_chunks = list(s)
    finally:
        done.set()
        feeder.join(timeout=30)
        server.close()
    assert not errors
    rec = tmp_path / "rec"
    assert sorted(p.name for p in rec.iterdir()) == ["run.bar_left.acraw", "run.log"]
    replayed = _replay(larch, rec / "run.log", rec / "run.bar_left.acraw")
    assert_same_chunks(live_chunks, replayed)
    # and the data made it through: every frame and (nearly) every sample
    assert sum(len(c.teeth) + len(c.status) for c in live_chunks) == sum(
        1 for m in msgs if m.arbitration_id in (0x0A0, 0x100))
    np.testing.assert_array_equal(
        _cat(live_chunks, "teeth", "periods"),
        np.concatenate([FrameDecoder(larch).push(_frames_batch(msgs))[0].periods]))
    # (the simulated capture may start mid-frame and carry a corrupt frame or two)
    assert live_chunks[-1].health.serial_good["bar_left"] >= 0.9 * seconds * 2000


def _frames_batch(msgs):
    from crankbeat.logger.can.sources.base import FrameBatch

    return FrameBatch.from_messages(msgs, range(len(msgs)))


def test_live_stops_on_an_idle_bus_and_releases_everything(tmp_path, larch):
    stop = threading.Event()
    channel = f"crankbeat-idle-{id(tmp_path)}"
    with live(larch, CanBus(interface="virtual", channel=channel), stop=stop) as s:
        threading.Timer(0.3, stop.set).start()
        chunks = list(s)
    assert chunks == []
    with pytest.raises(UsageError, match="no serial sensor"):
        live(larch, CanBus(interface="virtual", channel=channel), {"nope": "loop://"})
