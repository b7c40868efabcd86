"""Live faults on real parts: a store held by another SQLite connection, a stop by signal.

The ride runs in a thread (or a child process) and every wait in here is on a condition with a
generous deadline; whatever happens, the ride is told to stop and the test ends (a ride thread
that does not come back fails the test instead of hanging it). Frames go through python-can's
virtual bus, the store is a real SQLite file, the lock is a second ``sqlite3`` connection's
``BEGIN EXCLUSIVE`` (what any other program writing the file would hold).
"""

from __future__ import annotations

import importlib.util
import os
import signal
import sqlite3
import subprocess
import sys
import threading
import time
import uuid
from pathlib import Path

import can
import pytest

from crankbeat.logger.cli.main import main
from crankbeat.logger.store import Store

pytestmark = pytest.mark.skipif(
    importlib.util.find_spec("crankbeat.logger.cli.cmd_synth") is None,
    reason="needs the simulator (crankbeat synth)")

DEADLINE_S = 60.0  # for every condition waited on; generous, so load cannot fail a test


@pytest.fixture(scope="module")
def can_log(tmp_path_factory):
    out = tmp_path_factory.mktemp("faults")
    assert main(["synth", "--rig", "larch", "--duration", "30", "--rpm", "4000",
                 "--throttle", "30", "--seed", "5", "--out", str(out), "--quiet"]) == 0
    return out / "ride.log"


def wait_until(cond, what: str, deadline_s: float = DEADLINE_S) -> None:
    end = time.monotonic() + deadline_s
    while time.monotonic() < end:
        if cond():
            return
        time.sleep(0.05)
    raise AssertionError(f"gave up after {deadline_s:.0f} s waiting for {what}")


class Feeder(threading.Thread):
    """Plays a CAN log onto a virtual channel at its own pace until told to stop."""

    def __init__(self, log: Path, channel: str) -> None:
        super().__init__(daemon=True)
        self.log, self.channel = log, channel
        self.stop = threading.Event()
        self.sent = 0
        self.error: BaseException | None = None

    def run(self) -> None:
        try:
            with can.Bus(interface="virtual", channel=self.channel) as bus, \
                    can.LogReader(str(self.log)) as reader:
                t0, w0 = None, time.monotonic()
                for msg in reader:
                    if self.stop.is_set():
                        break
                    t0 = msg.timestamp if t0 is None else t0
                    delay = (msg.timestamp - t0) - (time.monotonic() - w0)
                    if delay > 0.002:
                        time.sleep(delay)
                    bus.send(msg)
                    self.sent += 1
        except BaseException as exc:  # noqa: BLE001 - reported by the test body
            self.error = exc


class RideThread(threading.Thread):
    """:func:`logger.live.ride.ride` on a virtual channel, recording into ``rec``."""

    def __init__(self, db: Path, channel: str, rec: Path, stem: str | None = None) -> None:
        super().__init__(daemon=True)
        self.stem = stem
        self.db, self.channel, self.rec = db, channel, rec
        self.stop = threading.Event()
        self.result = None
        self.error: BaseException | None = None
        self.said: list[str] = []
        self.bus = can.Bus(interface="virtual", channel=channel)  # joined before the feeder
        self.store = Store.open(db)  # as the command does: opened, then the ride starts

    def run(self) -> None:
        from crankbeat.logger.live.ride import ride
        from crankbeat.logger.rig import load_rig

        try:
            with self.store as store:
                self.result = ride(load_rig("larch"), self.bus, {}, store, record_dir=self.rec,
                                   stop_event=self.stop, say=self.said.append,
                                   record_stem=self.stem)
        except BaseException as exc:  # noqa: BLE001
            self.error = exc
        finally:
            self.bus.shutdown()

    def recorded_bytes(self) -> int:
        return sum(p.stat().st_size for p in self.rec.glob("*.log"))

    def finish(self) -> None:
        self.stop.set()
        self.join(DEADLINE_S)
        assert not self.is_alive(), "the ride did not end within the deadline after its stop"


def run_events(db: Path, run_id) -> tuple[dict, object]:
    with Store.open(db, create=False) as st:
        run = next(r for r in st.runs() if r["id"] == int(run_id))
        return run, st.events(int(run_id))


def replay_events(db: Path, log: Path, capsys):
    assert main(["replay", "--rig", "larch", "--can", str(log), "--store", str(db),
                 "--json", "--force"]) == 0
    capsys.readouterr()
    with Store.open(db) as st:
        return st.events(st.resolve_run("last"))


def _ride_with_lock(tmp_path, can_log, capsys, *, lock_at_start: bool):
    db, rec = tmp_path / "s.db", tmp_path / "rec"
    rec.mkdir()
    Store.open(db).close()
    channel = f"faults-{uuid.uuid4().hex[:8]}"
    locker = sqlite3.connect(str(db), isolation_level=None)
    ride = RideThread(db, channel, rec)
    feeder = Feeder(can_log, channel)
    t_start = None
    try:
        if lock_at_start:
            locker.execute("BEGIN EXCLUSIVE")
        t_start = time.monotonic()
        ride.start()
        feeder.start()
        if not lock_at_start:  # let the ride write some events, then take the lock
            def stored() -> int:
                with sqlite3.connect(str(db)) as c:
                    return c.execute("SELECT count(*) FROM events").fetchone()[0]
            wait_until(lambda: stored() > 0, "the first events in the store")
            locker.execute("BEGIN EXCLUSIVE")
        held_at = ride.recorded_bytes()
        # recording goes on while the store is held: the log grows by more than a second's worth
        wait_until(lambda: ride.recorded_bytes() > held_at + 20_000 or not ride.is_alive(),
                   "the recording to grow while the store is locked")
        first_frame_s = time.monotonic() - t_start
        assert ride.is_alive(), f"the ride ended under a held lock: {ride.error!r}"
        locker.execute("ROLLBACK")
        sent_at_release = feeder.sent
        wait_until(lambda: feeder.sent > sent_at_release + 1_000, "more frames after the release")
    finally:
        if locker.in_transaction:
            locker.execute("ROLLBACK")
        locker.close()
        feeder.stop.set()
        feeder.join(DEADLINE_S)
        ride.finish()
    assert feeder.error is None and ride.error is None, (feeder.error, ride.error)
    run, live = run_events(db, ride.result.run_id)
    assert run["status"] == "complete"
    (log,) = sorted(rec.glob("*.log"))
    with can.LogReader(str(log)) as reader:  # python-can reads the recording back
        assert sum(1 for _ in reader) == feeder.sent  # every frame sent was recorded
    faults = ride.result.summary["stream"]["live_faults"]
    assert any("store could not be written" in line for line in faults), faults
    assert ride.result.summary["stream"]["store_write_failures"] >= 1
    assert ride.result.summary["stream"]["store_rows_dropped"] == 0
    replayed = replay_events(db, log, capsys)
    assert len(live) > 0 and replayed.tobytes() == live.tobytes()
    return first_frame_s


def test_lock_held_at_the_start_records_at_once_and_stores_afterwards(tmp_path, can_log, capsys):
    # before the run's row was written behind, the ride waited the store's 10 s lock timeout
    # before reading the bus and then ended ("database is locked"); now the recording grows
    # while the lock is held, and the run is stored once it is released
    seconds = _ride_with_lock(tmp_path, can_log, capsys, lock_at_start=True)
    print(f"recording grew by 20 kB {seconds:.1f} s after the start under a held lock")


def test_lock_taken_mid_ride_is_buffered_and_written_when_released(tmp_path, can_log, capsys):
    _ride_with_lock(tmp_path, can_log, capsys, lock_at_start=False)


class CaptureServer(threading.Thread):
    """Serves an accelerometer capture on a local TCP port (pyserial's socket://) at its pace."""

    def __init__(self, capture: Path) -> None:
        import socket

        super().__init__(daemon=True)
        self.capture = capture
        self.server = socket.create_server(("127.0.0.1", 0))
        self.server.settimeout(DEADLINE_S)
        self.url = f"socket://127.0.0.1:{self.server.getsockname()[1]}"
        self.stop = threading.Event()

    def run(self) -> None:
        from crankbeat.logger.serial.capture import CaptureReader

        try:
            conn, _ = self.server.accept()
            with conn, CaptureReader(self.capture) as reader:
                t0 = w0 = None
                for host_time, data in reader:
                    if self.stop.is_set():
                        break
                    if t0 is None:
                        t0, w0 = host_time, time.monotonic()
                    delay = (host_time - t0) - (time.monotonic() - w0)
                    if delay > 0.01:
                        time.sleep(delay)
                    conn.sendall(data)
        except OSError:
            pass  # the ride closed the port

    def close(self) -> None:
        self.stop.set()
        self.server.close()
        self.join(DEADLINE_S)


@pytest.mark.skipif(not os.path.exists("/dev/full"), reason="needs /dev/full (Linux)")
def test_full_disk_stops_the_recording_and_the_analysis_goes_on(tmp_path, can_log):
    """The recording is written to /dev/full, the kernel's always-full device (ENOSPC)."""
    db, rec = tmp_path / "s.db", tmp_path / "rec"
    rec.mkdir()
    (rec / "full.log").symlink_to("/dev/full")
    Store.open(db).close()
    channel = f"faults-{uuid.uuid4().hex[:8]}"
    ride = RideThread(db, channel, rec, stem="full")
    feeder = Feeder(can_log, channel)

    def stored() -> int:
        with sqlite3.connect(str(db)) as c:
            return c.execute("SELECT count(*) FROM events").fetchone()[0]

    try:
        ride.start()
        feeder.start()
        wait_until(lambda: feeder.sent > 3_000 or not ride.is_alive(), "frames on the bus")
        at = stored()
        # the first flush hits the full device; events keep reaching the store after it
        wait_until(lambda: stored() > at + 100 or not ride.is_alive(), "events after the failure")
        assert ride.is_alive(), f"the ride ended on a full disk: {ride.error!r}"
    finally:
        feeder.stop.set()
        feeder.join(DEADLINE_S)
        ride.finish()
    assert ride.error is None, ride.error
    stream = ride.result.summary["stream"]
    assert "No space left on device" in (stream["recording_stopped"] or "")
    assert stream["frames_not_recorded"] > 0
    assert any("recording stopped" in line for line in stream["live_faults"])
    run, live = run_events(db, ride.result.run_id)
    assert run["status"] == "complete" and len(live) > 0


CHILD = r"""
import sys, threading
from crankbeat.logger.cli.main import main
sys.exit(main(sys.argv[1:]))
"""


@pytest.mark.skipif(not hasattr(signal, "SIGHUP"), reason="POSIX signals")
@pytest.mark.parametrize("signame", ["SIGTERM", "SIGHUP"])
def test_signal_ends_the_ride_like_ctrl_c(tmp_path, can_log, signame):
    """``crankbeat ride`` in a child process, fed over udp_multicast, ended by a signal."""
    channel = "239.74.163.%d" % (10 + os.getpid() % 200)
    db, rec = tmp_path / "s.db", tmp_path / "rec"
    serial = CaptureServer(can_log.with_name("ride.bar_left.acraw"))
    serial.start()
    cmd = [sys.executable, "-c", CHILD, "ride", "--rig", "larch", "--interface",
           "udp_multicast", "--channel", channel, "--store", str(db), "--record", str(rec),
           "--port", f"bar_left={serial.url}", "--plain"]
    child = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    sent = 0
    try:
        try:
            bus = can.Bus(interface="udp_multicast", channel=channel)
        except Exception as exc:  # noqa: BLE001 - a sandbox without multicast
            pytest.skip(f"udp_multicast not available here ({exc})")
        with bus, can.LogReader(str(can_log)) as reader:
            t0 = w0 = None
            for msg in reader:
                if t0 is None:
                    t0, w0 = msg.timestamp, time.monotonic()
                delay = (msg.timestamp - t0) - (time.monotonic() - w0)
                if delay > 0.002:
                    time.sleep(delay)
                bus.send(msg)
                sent += 1
                if msg.timestamp - t0 > 4.0 and any(rec.glob("*.log")) and \
                        sum(p.stat().st_size for p in rec.glob("*.log")) > 0:
                    break
                if child.poll() is not None:
                    break
        assert child.poll() is None, child.communicate()
        child.send_signal(getattr(signal, signame))
        out, err = child.communicate(timeout=DEADLINE_S)
    finally:
        if child.poll() is None:
            child.kill()
            child.communicate()
        serial.close()
    assert child.returncode == 0, err
    assert f"stopping the ride ({signame})" in err
    assert "CAUTION" in out  # the summary was printed
    with Store.open(db, create=False) as st:
        (run,) = st.runs()
    assert run["status"] == "interrupted"
    (log,) = sorted(rec.glob("*.log"))
    with can.LogReader(str(log)) as reader:
        recorded = sum(1 for _ in reader)
    assert 0 < recorded <= sent  # the recording was closed: python-can reads it to the end


class TinySocketcand(threading.Thread):
    """A socketcand server as small as python-can's client needs (its documented ASCII
    protocol: ``< hi >``, ``< open ch >``/``< ok >``, ``< rawmode >``/``< ok >``, then
    ``< frame ID SECS.USECS DATA >``): it sends frames until :meth:`drop` closes the link."""

    def __init__(self, port: int = 0) -> None:
        import socket

        super().__init__(daemon=True)
        self.server = socket.create_server(("127.0.0.1", port))
        self.server.settimeout(0.2)
        self.port = self.server.getsockname()[1]
        self.gone = threading.Event()
        self.sent = 0

    def run(self) -> None:
        while not self.gone.is_set():  # one client at a time, as many as come
            try:
                conn, _ = self.server.accept()
            except TimeoutError:
                continue
            except OSError:
                break
            with conn:
                try:
                    self._serve(conn)
                except OSError:
                    pass
        self.server.close()

    def _serve(self, conn) -> None:
        conn.sendall(b"< hi >")
        for _ in range(2):  # < open vcan0 >, < rawmode >
            if not conn.recv(256):
                return  # a probe that only checked the port answers
            conn.sendall(b"< ok >")
        while not self.gone.is_set():
            conn.sendall(f"< frame 123 {time.time():.6f} 0102 >".encode())
            self.sent += 1
            time.sleep(0.01)

    def drop(self) -> None:
        """The server goes away: its socket closes, which the client then reads as empty."""
        self.gone.set()
        self.join(DEADLINE_S)


def test_can_link_gone_is_said_polled_cheaply_and_reconnected(monkeypatch):
    import json

    from crankbeat.logger.live.watchdog import WatchedBus
    from crankbeat.logger.rig.model import CanBus

    first = TinySocketcand()
    first.start()
    monkeypatch.setenv("CAN_CONFIG", json.dumps({"host": "127.0.0.1", "port": first.port}))
    idle_calls: list[str | None] = []
    bus = WatchedBus(CanBus(interface="socketcand", channel="vcan0"),
                     on_idle=lambda b: idle_calls.append(b.state_line()))
    second = None
    try:
        def received(n: int) -> bool:
            return any(bus.recv(0.1) is not None for _ in range(n))

        wait_until(lambda: received(5) and bus.frames >= 20, "frames from the server")
        first.drop()
        # read as the ride's source does: recv(timeout) back to back, no pause of our own
        end = time.monotonic() + DEADLINE_S
        while bus.silent_for < bus.silence_s and time.monotonic() < end:
            bus.recv(0.1)
        polls_at_silence, silent_at = bus.polls, bus.silent_for
        while bus.silent_for < silent_at + 2.0 and time.monotonic() < end:
            bus.recv(0.1)
        silent_polls, silent_s = bus.polls - polls_at_silence, bus.silent_for - silent_at
        # a closed socket is readable for ever: unwatched, each poll returns at once (thousands
        # a second); watched, a few polls a second with back-off
        assert silent_polls < 40 * silent_s, (silent_polls, silent_s)
        print(f"{silent_polls} polls in {silent_s:.1f} s of a closed link")
        assert any(line and "no frame for" in line for line in idle_calls), idle_calls
        second = TinySocketcand(first.port)  # the server comes back on the same port
        second.start()
        wait_until(lambda: bus.recv(0.1) is not None and bus.reconnects >= 1, "the reconnect")
    finally:
        bus.shutdown()
        first.drop()
        if second is not None:
            second.drop()
    assert bus.breaks and bus.breaks[-1].reconnected and bus.breaks[-1].seconds > 1.0
    assert any("reconnected" in line for line in bus.fault_lines())
