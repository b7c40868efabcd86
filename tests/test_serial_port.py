"""The live port reader on pyserial's own loopback and socket URL handlers (no mocks).

``loop://`` passes bytes through a 4096-byte queue, so no single write here exceeds 1 KiB.
``socket://`` talks to a real TCP server thread on 127.0.0.1 that is stopped and started again
on the same port to play a pulled and re-plugged adapter. Every wait is bounded, and a fixture
fails any test that leaves a thread running.
"""

from __future__ import annotations

import socket
import threading
import time

import numpy as np
import pytest
from test_serial_sensors import Larch

from crankbeat.errors import SourceError
from crankbeat.logger.serial.frames import encode_frames
from crankbeat.logger.serial.parser import parse_stream
from crankbeat.logger.serial.port import PortReader


@pytest.fixture(autouse=True)
def no_thread_leak():
    before = set(threading.enumerate())
    yield
    deadline = time.monotonic() + 5
    while time.monotonic() < deadline:
        extra = [t for t in threading.enumerate() if t not in before and t.is_alive()]
        if not extra:
            return
        time.sleep(0.01)
    pytest.fail(f"threads left running: {extra}")


def _wait(cond, timeout=5.0):
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        if cond():
            return True
        time.sleep(0.005)
    return False


def _collect(reader, want_bytes, timeout=30.0):  # generous: a loaded machine is slow
    recs = []
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        recs += reader.read_available()
        if sum(len(d) for _, d in recs) >= want_bytes:
            break
        time.sleep(0.005)
    return recs


def _stream(n, seq0=0):
    acc = np.random.default_rng(seq0).integers(-3000, 3000, size=(n, 3))
    return encode_frames(Larch, seq0 + np.arange(n), (seq0 + np.arange(n)) * 500, acc), acc


def test_loop_url_delivers_every_byte_with_host_times():
    data, acc = _stream(300)  # 4800 bytes, written in pieces of 512 (< the 4096-byte queue)
    t_start = time.time()
    with PortReader("loop://", 921600, read_timeout_s=0.01) as r:
        for i in range(0, len(data), 512):
            assert r.write(data[i : i + 512]) == len(data[i : i + 512])
        recs = _collect(r, len(data))
    t_end = time.time()
    assert b"".join(d for _, d in recs) == data
    times = [t for t, _ in recs]
    assert times == sorted(times) and t_start <= times[0] and times[-1] <= t_end  # time.time base
    frames, counts = parse_stream(Larch, recs)
    np.testing.assert_array_equal(frames.accel, acc / 2048.0)
    assert counts.corrupt == 0 and counts.lost == 0


def test_queue_overflow_drops_reads_and_marks_a_break():
    with PortReader("loop://", 9600, queue_max=3, read_size=100, read_timeout_s=0.01) as r:
        r.write(bytes(1000))  # at least 10 reads of <= 100 bytes
        assert _wait(lambda: r.bytes_read == 1000)
        first = r.read_available()
        assert len(first) == 3 and r.dropped_reads >= 7
        r.write(b"\x01" * 50)
        assert _wait(lambda: r.bytes_read == 1050)
        after = r.read_available()
    assert after[0][1] == b"" and after[-1][1].endswith(b"\x01")


def test_first_open_failure_is_a_source_error():
    s = socket.socket()
    s.bind(("127.0.0.1", 0))
    port = s.getsockname()[1]
    s.close()  # nothing listens there now
    with pytest.raises(SourceError, match=f"socket://127.0.0.1:{port}: cannot open serial port"):
        PortReader(f"socket://127.0.0.1:{port}", 921600)
    with pytest.raises(SourceError, match="/dev/crankbeat-no-such-port"):
        PortReader("/dev/crankbeat-no-such-port", 921600)


START = b"GO\n"  # the start command our invented board waits for


class _Server:
    """A one-connection TCP server thread playing a board: it waits for :data:`START` (pyserial
    flushes input that arrives before ``open`` returns), sends ``payload`` in pieces, then either
    closes (``hold=False``) or keeps the connection until :meth:`stop`."""

    def __init__(self, port: int, payload: bytes, *, hold: bool) -> None:
        self.sock = socket.socket()
        self.sock.setsockopt(socket.SOL_SOCKET, socket.SO_REUSEADDR, 1)
        self.sock.bind(("127.0.0.1", port))
        self.sock.listen(1)
        self.sock.settimeout(5)
        self.port = self.sock.getsockname()[1]
        self.payload, self.hold = payload, hold
        self.done = threading.Event()
        self.thread = threading.Thread(target=self._serve)
        self.thread.start()

    def _serve(self):
        try:
            conn, _ = self.sock.accept()
        except OSError:
            return
        with conn:
            conn.settimeout(5)
            got = b""
            while not got.endswith(START):
                piece = conn.recv(16)
                if not piece:
                    return
                got += piece
            for i in range(0, len(self.payload), 700):
                conn.sendall(self.payload[i : i + 700])
                time.sleep(0.002)
            if self.hold:
                self.done.wait(5)
        self.sock.close()

    def stop(self):
        self.done.set()
        self.thread.join(5)
        self.sock.close()


def test_socket_url_reconnects_after_server_restart():
    part1, acc1 = _stream(200)
    part2, acc2 = _stream(150, seq0=5000)
    first = _Server(0, part1, hold=False)
    url = f"socket://127.0.0.1:{first.port}"
    with PortReader(url, 921600, reopen_every_s=0.05, read_timeout_s=0.01,
                    start_bytes=START) as r:
        recs = _collect(r, len(part1))
        assert _wait(lambda: r.gaps == 1)  # the server hung up: a gap, the port is down
        first.stop()
        assert not r.is_open or r.reconnects == 0
        time.sleep(0.12)  # a couple of refused reopen attempts while nothing listens
        assert r.reconnects == 0
        second = _Server(first.port, part2, hold=True)
        try:
            assert _wait(lambda: r.reconnects == 1)
            recs += _collect(r, len(part2))
        finally:
            second.stop()
        assert r.alive
    assert not r.alive
    marks = [i for i, (_, d) in enumerate(recs) if d == b""]
    assert len(marks) == 1
    assert b"".join(d for _, d in recs[: marks[0]]) == part1
    assert b"".join(d for _, d in recs[marks[0] + 1 :]) == part2
    frames, counts = parse_stream(Larch, recs)
    np.testing.assert_array_equal(frames.accel, np.vstack([acc1, acc2]) / 2048.0)
    assert counts.breaks == 1 and frames.break_before.sum() >= 1 and frames.break_before[200]


def test_no_reconnect_ends_the_thread_at_the_first_failure():
    server = _Server(0, b"abc", hold=False)
    r = PortReader(f"socket://127.0.0.1:{server.port}", 921600, reconnect=False,
                   read_timeout_s=0.01, start_bytes=START)
    try:
        assert _wait(lambda: not r.alive)
        assert r.gaps == 1 and r.reconnects == 0
        assert [d for _, d in r.read_available()] in ([b"abc", b""], [b"a", b"bc", b""],
                                                      [b"ab", b"c", b""], [b"a", b"b", b"c", b""])
    finally:
        r.close()
        server.stop()


def test_posix_tty_backend_on_a_pseudo_terminal():
    # A pty is a real tty: pyserial's posix backend (termios, select) runs as on a USB adapter.
    # Closing the master end plays the pulled adapter: the tty read fails with EIO.
    import os
    import tty

    master, slave = os.openpty()
    tty.setraw(slave)
    path = os.ttyname(slave)
    data, acc = _stream(100)
    try:
        # No reconnect: a freed pty number may be handed to another process at once.
        with PortReader(path, 921600, reconnect=False, read_timeout_s=0.01) as r:
            os.close(slave)
            slave = -1
            for i in range(0, len(data), 256):
                os.write(master, data[i : i + 256])
            recs = _collect(r, len(data))
            os.close(master)
            master = -1
            assert _wait(lambda: r.gaps == 1)
            recs += r.read_available()
    finally:
        for fd in (master, slave):
            if fd >= 0:
                os.close(fd)
    assert recs[-1][1] == b"" and b"".join(d for _, d in recs) == data
    frames, _ = parse_stream(Larch, recs)
    np.testing.assert_array_equal(frames.accel, acc / 2048.0)
