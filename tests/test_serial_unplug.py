"""Frames lost while the adapter was out, on a board with short counters.

The reference four's seat board counts frames in one byte at 1 kHz and time in a u16 of 10 µs:
the sequence turns every 0.256 s and the clock every 0.655 s, so a pulled adapter wraps both,
and the board's counters alone tell the lost frames only modulo a turn. Across a link break the
parser takes the whole turns from the host's elapsed time. Checked on exact host times, and on
pyserial's ``socket://`` handler talking to a real TCP server that plays the board in real
time, is stopped (the adapter pulled) while the board goes on counting, and started again on the
same port.
"""

from __future__ import annotations

import socket
import threading
import time
from dataclasses import replace

import numpy as np
import pytest

from crankbeat.logger.rig import load_rig
from crankbeat.logger.serial.decoder import SerialDecoder
from crankbeat.logger.serial.frames import encode_frames
from crankbeat.logger.serial.parser import parse_stream
from crankbeat.logger.serial.port import PortReader

SEAT = load_rig("alder").sensor("seat")
RATE = SEAT.sample_rate_hz
START = b"GO\n"


def _frames(seq: np.ndarray, sensor=SEAT) -> bytes:
    acc = np.stack([seq % 97, -(seq % 89), seq % 83], axis=1).astype(np.int64)
    ticks = np.round(seq / RATE / SEAT.device_time_unit_s).astype(np.int64)
    return encode_frames(sensor, seq, ticks % SEAT.device_time_modulo, acc)


@pytest.mark.parametrize("clock", [True, False], ids=["u16-clock", "no-clock"])
def test_counter_wraps_across_a_break_are_counted_from_host_time(clock):
    assert SEAT.sequence_modulo == 256 and SEAT.device_time_modulo == 65536
    sensor = SEAT if clock else replace(
        SEAT, fields=tuple(f for f in SEAT.fields if f.role != "device_time"))
    before, after = np.arange(0, 500), np.arange(1800, 2300)  # 1300 frames never read
    t0 = 1_767_225_600.0
    recs = [(t0 + (s + 1) / RATE, _frames(np.array([s]), sensor)) for s in before]
    recs.append((recs[-1][0] + 0.05, b""))  # the adapter was pulled
    recs += [(t0 + (s + 1) / RATE, _frames(np.array([s]), sensor)) for s in after]
    frames, counts = parse_stream(sensor, recs)
    assert counts.lost == 1300 and counts.breaks == 1
    assert frames.lost_before[500] == 1300 and frames.break_before[500]
    # within a running link host time is not used (a late read must not invent turns): the
    # count is what the board's counters say, right modulo a sequence turn only
    del recs[500]
    _, counts = parse_stream(sensor, recs)
    assert counts.lost % 256 == 1300 % 256 and counts.lost < 1300


class _Board:
    """The seat board on a TCP port: frames sent in real time from a counter running since
    ``t0`` (it keeps counting while nobody listens), from :data:`START` for ``seconds``."""

    def __init__(self, port: int, t0: float, seconds: float, *, hold: bool) -> None:
        self.sock = socket.socket()
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.sock.bind(("127.0.0.1", port))
        self.sock.listen(1)
        self.sock.settimeout(10)
        self.port = self.sock.getsockname()[1]
        self.t0, self.seconds, self.hold = t0, seconds, hold
        self.first = self.last = -1
        self.done = threading.Event()
        self.sent = threading.Event()
        self.thread = threading.Thread(target=self._serve)
        self.thread.start()

    def _serve(self) -> None:
        try:
            conn, _ = self.sock.accept()
        except OSError:
            return
        with conn:
            got = b""
            while not got.endswith(START):
                piece = conn.recv(16)
                if not piece:
                    return
                got += piece
            nxt = int((time.time() - self.t0) * RATE)
            self.first = nxt
            end = time.time() + self.seconds
            while time.time() < end:
                upto = int((time.time() - self.t0) * RATE)
                if upto > nxt:
                    conn.sendall(_frames(np.arange(nxt, upto)))
                    self.last, nxt = upto - 1, upto
                time.sleep(0.005)
            self.sent.set()
            if self.hold:
                self.done.wait(10)
        self.sock.close()

    def stop(self) -> None:
        self.done.set()
        self.thread.join(10)
        self.sock.close()


def test_pulled_adapter_on_a_socket_url_counts_the_whole_gap():
    t0 = time.time()
    first = _Board(0, t0, 0.4, hold=False)
    url = f"socket://127.0.0.1:{first.port}"
    recs = []
    with PortReader(url, 460800, reopen_every_s=0.05, read_timeout_s=0.01,
                    start_bytes=START) as r:
        deadline = time.monotonic() + 30
        while r.gaps == 0 and time.monotonic() < deadline:
            recs += r.read_available()
            time.sleep(0.005)
        first.stop()
        time.sleep(1.2)  # pulled: the board counts on, nothing is read
        second = _Board(first.port, t0, 0.4, hold=True)
        try:
            assert second.sent.wait(30)
            time.sleep(0.1)
            recs += r.read_available()
        finally:
            second.stop()
    missing = second.first - first.last - 1
    assert missing > 1000, "the test needs a gap of several counter turns"
    dec = SerialDecoder(SEAT)
    n = sum(len(dec.push(recs[i : i + 7])) for i in range(0, len(recs), 7)) + len(dec.flush())
    assert dec.health.breaks == 1 and n == dec.health.good
    assert dec.health.good == (first.last - first.first + 1) + (second.last - second.first + 1)
    # host times bound the estimate to the reads' latency, well inside half a counter turn
    assert dec.health.lost == pytest.approx(missing, abs=100)
