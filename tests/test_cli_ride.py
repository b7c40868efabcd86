"""``crankbeat ride`` on python-can's virtual bus and a socket:// serial port, end to end.

A recorded ride is played onto the virtual bus and through a local TCP server at its own pace;
the command records, analyses and stores it; then the recording is replayed and must give the
same events (live and replay are one code path, DEVELOPERS.md "Data flow").
"""

from __future__ import annotations

import importlib.util
import os
import signal
import socket
import threading
import time
import uuid

import can
import pytest

from crankbeat.logger.cli.main import main
from crankbeat.logger.store import Store

pytestmark = pytest.mark.skipif(
    importlib.util.find_spec("crankbeat.logger.pipeline") is None
    or importlib.util.find_spec("crankbeat.logger.cli.cmd_synth") is None,
    reason="needs logger.pipeline and the simulator (crankbeat synth)")

RIDE_S = 3.0  # seconds of ride played live


@pytest.fixture(scope="module")
def short_ride(tmp_path_factory):
    out = tmp_path_factory.mktemp("live")
    assert main(["synth", "--rig", "larch", "--duration", "6", "--rpm", "4000", "--throttle", "30",
                 "--misfire-cylinder", "1", "--misfire-rate", "0.05", "--seed", "11",
                 "--out", str(out), "--quiet"]) == 0
    return out / "ride.log", out / "ride.bar_left.acraw"


def _wait_for_listener(channel: str, deadline_s: float = 30.0) -> None:
    """Until the command's bus is attached to the virtual channel (python-can keeps a list)."""
    from can.interfaces import virtual

    end = time.monotonic() + deadline_s
    while time.monotonic() < end:
        if len(virtual.channels.get(channel, [])) >= 2:  # ours + the command's
            return
        time.sleep(0.05)
    raise AssertionError("crankbeat ride never opened the virtual bus")


def test_ride_records_analyses_and_replays_the_same(tmp_path, short_ride, capsys):
    from crankbeat.logger.serial.capture import CaptureReader

    log, cap = short_ride
    channel = f"crankbeat-test-{uuid.uuid4().hex[:8]}"
    server = socket.create_server(("127.0.0.1", 0))
    port = server.getsockname()[1]
    sent = {"frames": 0}
    errors: list[BaseException] = []

    def serve_serial():
        try:
            server.settimeout(30)
            conn, _ = server.accept()
            with conn, CaptureReader(cap) as reader:
                records = list(reader)
                t0, w0 = records[0][0], time.monotonic()
                for host_time, data in records:
                    if host_time - t0 > RIDE_S + 0.5:
                        break
                    delay = (host_time - t0) - (time.monotonic() - w0)
                    if delay > 0:
                        time.sleep(delay)
                    conn.sendall(data)
                time.sleep(1.0)  # keep the port open until the ride is stopped
        except BaseException as exc:  # noqa: BLE001 - reported by the test body
            errors.append(exc)

    def feed_can():
        try:
            with can.Bus(interface="virtual", channel=channel) as bus:
                _wait_for_listener(channel)
                with can.LogReader(str(log)) as reader:
                    t0, w0 = None, time.monotonic()
                    for msg in reader:
                        t0 = msg.timestamp if t0 is None else t0
                        if msg.timestamp - t0 > RIDE_S:
                            break
                        delay = (msg.timestamp - t0) - (time.monotonic() - w0)
                        if delay > 0.002:
                            time.sleep(delay)
                        bus.send(msg)
                        sent["frames"] += 1
                time.sleep(0.5)
        except BaseException as exc:  # noqa: BLE001
            errors.append(exc)
        finally:
            if riding.is_set():  # never interrupt pytest itself once the command is back
                os.kill(os.getpid(), signal.SIGINT)  # what a rider's Ctrl-C does

    riding = threading.Event()
    riding.set()
    threads = [threading.Thread(target=serve_serial, daemon=True),
               threading.Thread(target=feed_can, daemon=True)]
    for th in threads:
        th.start()
    db = tmp_path / "live.db"
    rec = tmp_path / "rec"
    try:
        code = main(["ride", "--rig", "larch", "--interface", "virtual", "--channel", channel,
                     "--port", f"bar_left=socket://127.0.0.1:{port}", "--record", str(rec),
                     "--store", str(db), "--label", "live-test", "--plain"])
    finally:
        riding.clear()
        for th in threads:
            th.join(timeout=10)
        server.close()
    out, err = capsys.readouterr()
    assert not errors, errors
    assert code == 0, err
    assert "CAUTION: Ride only on a closed course" in out
    assert "stopping the ride" in err

    with Store.open(db, create=False) as st:
        (run,) = st.runs()
        live_events = st.events(run["id"])
    assert run["status"] == "complete" and run["label"] == "live-test"
    assert len(live_events) > 0

    logs = sorted(rec.glob("*.log"))
    caps = sorted(rec.glob("*.acraw"))
    assert len(logs) == 1 and len(caps) == 1
    with can.LogReader(str(logs[0])) as reader:  # python-can reads the recording back
        recorded = sum(1 for _ in reader)
    assert recorded == sent["frames"]

    code = main(["replay", "--rig", "larch", "--can", str(logs[0]), "--accel", str(caps[0]),
                 "--store", str(db), "--json"])
    capsys.readouterr()
    assert code == 0
    with Store.open(db) as st:
        replayed = st.events(st.resolve_run("last"))
    assert replayed.tobytes() == live_events.tobytes()
