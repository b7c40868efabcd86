"""Read a live serial port in a background thread, surviving a pulled adapter.

:class:`PortReader` opens any pyserial URL (``/dev/ttyUSB0``, ``loop://``, ``socket://host:port``,
``rfc2217://...``) and queues each read as ``(host_time, bytes)``. The host time is
``time.time()`` taken when the read returns, on purpose not ``time.monotonic()``: python-can's
live buses stamp CAN frames with ``time.time()``, and the serial samples must land on the CAN
time base. (A wall clock stepped during a ride shows up as a clock jump; see
:mod:`logger.timebase`.)

When the adapter disappears (``SerialException`` or ``OSError`` from pyserial), the reader
queues a zero-length record as a break marker, counts a gap, and tries to reopen the same URL
every ``reopen_every_s`` until it succeeds or is closed; each successful reopen counts a
reconnect. The same marker is queued when the bounded queue overflowed and reads were dropped,
so that the parser never joins bytes across a hole.
"""

from __future__ import annotations

import threading
import time
from collections import deque

import serial
from serial.urlhandler import protocol_socket

from crankbeat.errors import SourceError

Record = tuple[float, bytes]
#: pyserial's ``socket://`` handler (its ``in_waiting`` is a ready flag, see _read_waiting)
_SocketPort = protocol_socket.Serial


class PortReader:
    """A serial port read by a thread into a bounded queue of ``(host_time, bytes)``.

    Parameters
    ----------
    url : str
        Device path or pyserial URL.
    baud : int
        Baud rate (ignored by URL handlers that have none).
    queue_max : int, optional
        Most reads held before the oldest unread ones are dropped; at 10 ms per read the
        default 6000 holds a minute.
    reconnect : bool, optional
        Reopen the port after it fails (default). If False the thread ends at the first failure.
    reopen_every_s : float, optional
        Pause between attempts to reopen, s.
    read_timeout_s : float, optional
        pyserial read timeout: a read returns after this long with whatever arrived, s. It
        bounds the latency of live data.
    read_size : int, optional
        Largest single read, bytes.
    start_bytes : bytes, optional
        Sent to the board after every (re)open, for boards that stream only when told to.
        pyserial discards what arrived before the port was open, so a board that starts on
        its own loses its first bytes after a reconnect; one that waits for this does not.

    Raises
    ------
    SourceError
        The port cannot be opened the first time (wrong name, no permission, nothing listening).
    """

    def __init__(
        self,
        url: str,
        baud: int,
        *,
        queue_max: int = 6000,
        reconnect: bool = True,
        reopen_every_s: float = 0.5,
        read_timeout_s: float = 0.01,
        read_size: int = 4096,
        start_bytes: bytes = b"",
    ) -> None:
        self.url = url
        self.baud = int(baud)
        self.queue_max = int(queue_max)
        self.reconnect = reconnect
        self.reopen_every_s = float(reopen_every_s)
        self.read_timeout_s = float(read_timeout_s)
        self.read_size = int(read_size)
        self.start_bytes = bytes(start_bytes)
        self.gaps = 0
        self.reconnects = 0
        self.dropped_reads = 0
        self.bytes_read = 0
        self.last_error: str | None = None
        self._queue: deque[Record] = deque()
        self._lock = threading.Lock()
        self._overflowed = False
        self._stop = threading.Event()
        self._port_lock = threading.Lock()
        try:
            self._port: serial.SerialBase | None = self._open()
        except (serial.SerialException, OSError, ValueError) as exc:
            raise SourceError(f"{url}: cannot open serial port: {exc}") from None
        self._thread = threading.Thread(target=self._run, name=f"PortReader({url})", daemon=True)
        self._thread.start()

    # -- public ---------------------------------------------------------------------------
    def read_available(self) -> list[Record]:
        """Every queued read, oldest first (break markers are zero-length records)."""
        with self._lock:
            out = list(self._queue)
            self._queue.clear()
        return out

    def write(self, data: bytes) -> int:
        """Send bytes to the board (a start command, say); 0 while the port is down."""
        with self._port_lock:
            port = self._port
            if port is None:
                return 0
            try:
                return port.write(data) or 0
            except (serial.SerialException, OSError):
                return 0

    @property
    def is_open(self) -> bool:
        return self._port is not None

    @property
    def alive(self) -> bool:
        """The reading thread is running."""
        return self._thread.is_alive()

    def close(self) -> None:
        """Stop the thread (joined) and close the port. Safe to call twice."""
        self._stop.set()
        self._thread.join(timeout=max(5.0, 4 * (self.read_timeout_s + self.reopen_every_s)))
        self._close_port()

    def __enter__(self) -> PortReader:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

    # -- thread ---------------------------------------------------------------------------
    def _open(self) -> serial.SerialBase:
        port = serial.serial_for_url(self.url, baudrate=self.baud, timeout=self.read_timeout_s)
        if self.start_bytes:
            try:
                port.write(self.start_bytes)
            except (serial.SerialException, OSError):
                port.close()
                raise
        return port

    def _close_port(self) -> None:
        with self._port_lock:
            port, self._port = self._port, None
        if port is not None:
            try:
                port.close()
            except (serial.SerialException, OSError):
                pass

    def _read_waiting(self, port: serial.SerialBase, waiting: int, most: int) -> bytes:
        """The bytes already waiting, up to ``most``, without blocking.

        pyserial's ``socket://`` handler gives ``in_waiting`` 1 whenever the socket is
        readable (a ready flag, not a count): read one byte at a time, a 30 kB/s board cost
        half a core. There every waiting byte is taken in one read with no timeout (the
        handler ignores port settings, so the timeout is only an attribute).
        """
        if isinstance(port, _SocketPort):
            port.timeout = 0
            try:
                return port.read(most)
            finally:
                port.timeout = self.read_timeout_s
        return port.read(min(waiting, most))

    def _enqueue(self, rec: Record) -> None:
        with self._lock:
            if len(self._queue) >= self.queue_max:
                self.dropped_reads += 1
                self._overflowed = True
                return
            if self._overflowed and rec[1]:
                self._queue.append((rec[0], b""))
                self._overflowed = False
            self._queue.append(rec)

    def _run(self) -> None:
        while not self._stop.is_set():
            port = self._port
            if port is None:
                if not self.reconnect or self._stop.wait(self.reopen_every_s):
                    return
                try:
                    opened = self._open()
                except (serial.SerialException, OSError, ValueError) as exc:
                    self.last_error = str(exc)
                    continue
                with self._port_lock:
                    self._port = opened
                self.reconnects += 1
                continue
            data = b""
            try:
                # One byte with the timeout, then whatever is already waiting: a read never
                # blocks on bytes that have not come, so bytes read before a failure are kept.
                data = port.read(1)
                while data and len(data) < self.read_size:
                    waiting = port.in_waiting
                    if not waiting:
                        break
                    more = self._read_waiting(port, waiting, self.read_size - len(data))
                    if not more:
                        break
                    data += more
            except (serial.SerialException, OSError, TypeError, AttributeError) as exc:
                # TypeError/AttributeError: pyserial's posix backend after the fd vanished.
                if data:
                    self.bytes_read += len(data)
                    self._enqueue((time.time(), data))
                if self._stop.is_set():
                    return
                self.last_error = str(exc)
                self.gaps += 1
                self._close_port()
                self._enqueue((time.time(), b""))
                continue
            if data:
                self.bytes_read += len(data)
                self._enqueue((time.time(), data))
