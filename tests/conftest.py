"""Shared fixtures: a leak guard for buses, ports, databases and threads, and a small synthetic
Larch ride (CAN frames laid out with our encoder, serial frames with the serial encoder)."""

from __future__ import annotations

import gc
import sqlite3
import threading
import weakref
from pathlib import Path

import can
import numpy as np
import pytest
import serial
from serial.urlhandler import protocol_loop, protocol_socket

_open_buses: set[int] = set()
_orig_bus_init = can.BusABC.__init__
_orig_bus_shutdown = can.BusABC.shutdown


def _tracking_init(self, *args, **kwargs):
    _orig_bus_init(self, *args, **kwargs)
    _open_buses.add(id(self))


def _tracking_shutdown(self):
    _open_buses.discard(id(self))
    return _orig_bus_shutdown(self)


can.BusABC.__init__ = _tracking_init
can.BusABC.shutdown = _tracking_shutdown

# Serial ports and sqlite connections opened by the code under test, held weakly: an object
# dropped without close() is freed (and closed) by CPython, which is not a leak.
_serials: weakref.WeakSet = weakref.WeakSet()


def _track_serial_open(cls):
    orig = cls.open

    def open_(self, *a, **k):
        _serials.add(self)
        return orig(self, *a, **k)

    cls.open = open_


for _cls in {protocol_loop.Serial, protocol_socket.Serial, serial.Serial}:
    _track_serial_open(_cls)


class _TrackedConnection(sqlite3.Connection):
    """sqlite3.Connection itself takes no weak references; a subclass does."""


_dbs: weakref.WeakSet = weakref.WeakSet()
_orig_connect = sqlite3.connect


def _tracking_connect(*args, **kwargs):
    kwargs.setdefault("factory", _TrackedConnection)
    conn = _orig_connect(*args, **kwargs)
    if isinstance(conn, _TrackedConnection):
        _dbs.add(conn)
    return conn


sqlite3.connect = _tracking_connect


def _db_open(conn) -> bool:
    try:
        conn.total_changes  # noqa: B018 - raises on a closed connection
        return True
    except sqlite3.ProgrammingError:
        return False


def _leaks(buses, serials, dbs, threads) -> list[str]:
    out = []
    if _open_buses - buses:
        out.append(f"{len(_open_buses - buses)} python-can bus(es) not shut down")
    ports = [p for p in _serials if p not in serials and p.is_open]
    if ports:
        out.append(f"serial port(s) left open: {[p.portstr for p in ports]}")
    conns = [c for c in _dbs if c not in dbs and _db_open(c)]
    if conns:
        out.append(f"{len(conns)} sqlite connection(s) left open")
    extra = [t for t in threading.enumerate() if t not in threads and t.is_alive()]
    if extra:
        out.append(f"threads still running: {[t.name for t in extra]}")
    return out


@pytest.fixture(autouse=True)
def no_leaks(request):
    """Fail a test that leaves a python-can bus, a serial port, a sqlite connection or a thread
    open (python-can's and sqlite-utils' test suites guard the same way)."""
    if "allow_leaks" in request.keywords:
        yield
        return
    buses, serials, dbs = set(_open_buses), set(_serials), set(_dbs)
    threads = set(threading.enumerate())
    yield
    leaked = _leaks(buses, serials, dbs, threads)
    if leaked:  # give objects dropped without close() and ending threads a moment
        gc.collect()
        for t in threading.enumerate():
            if t not in threads:
                t.join(timeout=1.0)
        leaked = _leaks(buses, serials, dbs, threads)
    if leaked:
        pytest.fail("resource leak: " + "; ".join(leaked), pytrace=False)


def pytest_configure(config):
    config.addinivalue_line("markers", "allow_leaks: skip the resource leak guard")


@pytest.fixture(scope="session")
def larch():
    from crankbeat.logger.rig import load_rig

    return load_rig("larch")


def larch_frames(rig, *, seconds: float = 1.0, rpm: float = 3000.0, t0: float = 1_767_225_600.0,
              extra_ids: bool = False) -> list[can.Message]:
    """Tooth and status frames of the Larch rig at a steady speed, laid out by the rig's signals.

    The tooth periods follow a 60-2 wheel (the gap period three times the others, docs/rig.md);
    this is test data to carry bits end to end, not physics.
    """
    from crankbeat.logger.can.bits import encode_signal

    teeth_msg = rig.message_for("tooth_periods")
    status_msg = rig.message_for("engine_speed")
    tooth = 60.0 / (rpm * rig.wheel.teeth)
    periods = []
    for _ in range(int(seconds / (tooth * rig.wheel.teeth)) + 2):
        periods += [tooth] * (rig.wheel.real_teeth - 1) + [tooth * (rig.wheel.missing + 1)]
    periods = np.array(periods) * (1 + 0.01 * np.sin(np.arange(len(periods)) / 7.0))
    k = teeth_msg.signal_for("tooth_periods").count
    n = len(periods) // k
    per = periods[: n * k].reshape(n, k)
    t_teeth = t0 + np.cumsum(per.sum(1))
    keep = t_teeth < t0 + seconds
    per, t_teeth = per[keep], t_teeth[keep]
    data = np.zeros((len(per), teeth_msg.length), np.uint8)
    encode_signal(per, teeth_msg.signal_for("tooth_periods"), data)
    encode_signal(np.arange(len(per)) % 256, teeth_msg.signal_for("counter"), data)
    encode_signal((np.arange(len(per)) // 20) % 2, teeth_msg.signal_for("cam_level"), data)
    msgs = [(t, teeth_msg.can_id, bytes(d)) for t, d in zip(t_teeth, data, strict=True)]
    t_status = t0 + np.arange(0.0, seconds, 1.0 / status_msg.rate_hz)
    sdata = np.zeros((len(t_status), status_msg.length), np.uint8)
    for role, v in (("engine_speed", rpm + 10 * np.sin(t_status - t0)), ("throttle", 22.5),
                    ("gear", 3), ("coolant", 88), ("road_speed", 61.3),
                    ("counter", np.arange(len(t_status)) % 256)):
        encode_signal(v, status_msg.signal_for(role), sdata)
    msgs += [(t, status_msg.can_id, bytes(d)) for t, d in zip(t_status, sdata, strict=True)]
    if extra_ids:
        msgs += [(t, 0x555, b"\x01\x02") for t in t_status[::10]]
    msgs.sort(key=lambda m: m[0])
    return [can.Message(timestamp=round(float(t), 6), arbitration_id=i, is_extended_id=False,
                        data=d) for t, i, d in msgs]


def larch_serial(rig, *, seconds: float = 1.0, t0: float = 1_767_225_600.0,
              read_every: float = 0.004) -> list[tuple[float, bytes]]:
    """Serial reads (host_time, bytes) of the Larch board: frames cut into USB-sized reads."""
    from crankbeat.logger.serial.frames import encode_frames

    sensor = rig.sensors[0]
    n = int(seconds * sensor.sample_rate_hz)
    t = np.arange(n) / sensor.sample_rate_hz
    acc = np.stack([np.sin(2 * np.pi * 50 * t), np.cos(2 * np.pi * 90 * t), 1 + 0 * t], 1)
    raw = encode_frames(sensor, np.arange(n), (t * 1e6).astype(np.int64) + 12345,
                        np.round(acc * 2048).astype(np.int64))
    fl = sensor.frame_length
    per_read = int(round(read_every * sensor.sample_rate_hz))
    out = []
    for a in range(0, n, per_read):
        z = min(a + per_read, n)
        out.append((round(float(t0 + t[z - 1] + 0.002), 6), raw[a * fl : z * fl]))
    return out


@pytest.fixture(scope="module")
def demo_ride():
    """The demo ride (candump .log + bar_left capture): long enough to be killed mid-way."""
    demo = Path(__file__).resolve().parents[1] / "fixtures" / "demo"
    log, caps = demo / "demo.log", sorted(demo.glob("demo.*.acraw"))
    if not log.is_file():
        pytest.skip("fixtures/demo is missing (make fixtures)")
    return log, caps
