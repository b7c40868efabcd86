"""Live bus source on python-can's virtual bus."""

from __future__ import annotations

import can
import numpy as np
import pytest

from crankbeat.errors import SourceError
from crankbeat.logger.can.sources import BusSource
from crankbeat.logger.rig.model import CanBus


def test_frames_arrive_in_order_with_candump_resolution(request):
    channel = f"bus-{request.node.name}"
    with can.Bus(interface="virtual", channel=channel, preserve_timestamps=True) as tx, \
            BusSource(CanBus(interface="virtual", channel=channel), timeout=0.05) as src:
        sent = [can.Message(timestamp=1_767_225_600.0 + i * 1.234567e-4 + 3e-8,
                            arbitration_id=0x100 + i, is_extended_id=i % 2 == 1,
                            data=bytes([i]) * (i % 9)) for i in range(40)]
        sent.append(can.Message(timestamp=1_767_225_601.0, arbitration_id=0x7, dlc=2,
                                is_remote_frame=True, is_extended_id=False))
        for m in sent:
            tx.send(m)
        got = src.recv_batch(max_frames=25)
        rest = src.recv_batch()
        empty = src.recv_batch()  # a quiet bus hands back an empty batch after the timeout
    assert (len(got), len(rest), len(empty)) == (25, 16, 0)
    ids = np.concatenate([got.can_id, rest.can_id])
    assert ids.tolist() == [m.arbitration_id for m in sent]
    ts = np.concatenate([got.ts, rest.ts])
    # what a candump log would keep: "%f" then float() (python-can's CanutilsLogWriter/Reader)
    assert ts.tolist() == [float(f"{m.timestamp:f}") for m in sent]
    assert rest.is_remote[-1] and rest.dlc[-1] == 2
    assert got.index.tolist() == list(range(25)) and rest.index[0] == 25
    assert bytes(got.data[3, :3]) == b"\x03\x03\x03"


def test_an_open_bus_is_left_open(request):
    bus = can.Bus(interface="virtual", channel=f"bus-{request.node.name}")
    try:
        src = BusSource(bus)
        src.close()
        bus.send(can.Message(arbitration_id=1, is_extended_id=False))  # still usable
    finally:
        bus.shutdown()


def test_unknown_interface_is_a_source_error():
    with pytest.raises(SourceError, match="CAN bus no-such-interface:can9: cannot open"):
        BusSource(CanBus(interface="no-such-interface", channel="can9"))


def test_the_leak_guard_sees_open_buses_ports_and_databases(tmp_path):
    import sqlite3
    import threading

    import conftest
    import serial

    def leaks():
        return conftest._leaks(before[0], before[1], before[2], before[3])

    before = (set(conftest._open_buses), set(conftest._serials), set(conftest._dbs),
              set(threading.enumerate()))
    bus = can.Bus(interface="virtual", channel="guard")
    port = serial.serial_for_url("loop://")
    db = sqlite3.connect(str(tmp_path / "g.db"))
    try:
        found = leaks()
        assert any("bus" in f for f in found) and any("serial" in f for f in found)
        assert any("sqlite" in f for f in found)
    finally:
        bus.shutdown()
        port.close()
        db.close()
    assert leaks() == []


def test_microsecond_times_are_what_python_cans_candump_writer_and_reader_keep(tmp_path):
    from crankbeat.logger.can.sources.bus import candump_microseconds

    rng = np.random.default_rng(3)
    base = 1_767_225_600.0
    # in time order: the writer stamps a time going backwards with the one before it
    ts = np.sort(np.concatenate((
        base + rng.uniform(0.0, 86_400.0, 3000),
        base + np.round(rng.uniform(0.0, 86_400.0, 1000) * 2e6) / 2e6,  # exact half-µs ties
        [2.0**19, 1.5, 12.000_000_5, 1e10],  # outside the vectorised range: via strings
    )))
    path = tmp_path / "times.log"
    with can.CanutilsLogWriter(path) as w:  # reference: python-can's own candump writer/reader
        for t in ts:
            w.on_message_received(can.Message(timestamp=float(t), arbitration_id=1,
                                              is_extended_id=False, channel="vcan0"))
    kept = [m.timestamp for m in can.LogReader(path)]
    assert candump_microseconds(ts).tolist() == kept
