"""Serial capture files: the raw bytes of a port with their host arrival times.

Format (crankbeat's own, see docs/rig.md): the 8-byte magic ``ACCRAW1\\n``, then records of
``float64 LE host time (s) | uint32 LE byte count n | n raw bytes``. Host times are on the
same clock as the CAN log's timestamps (``time.time()`` for live python-can buses), so a replay
sees exactly what the live run saw. A zero-length record marks a break in the link (the
adapter was pulled and reopened): the bytes on either side do not belong together.

A file may end mid-record (power lost during a ride); :class:`CaptureReader` keeps every whole
record before the cut and says where the cut is in :attr:`CaptureReader.notes`.
"""

from __future__ import annotations

import os
import struct
from collections.abc import Iterator
from typing import BinaryIO

from crankbeat.errors import FormatError, SourceError

MAGIC = b"ACCRAW1\n"
_HEADER = struct.Struct("<dI")
#: A record claiming more than this is taken as corruption, not data (a USB read is KiB).
MAX_RECORD_BYTES = 16 * 1024 * 1024

Record = tuple[float, bytes]


class CaptureWriter:
    """Write a serial capture file.

    Parameters
    ----------
    target : str, os.PathLike or binary file
        Path to create (truncated if it exists), or an open binary file positioned where the
        capture should start; an open file is not closed by :meth:`close`.

    Examples
    --------
    >>> with CaptureWriter("ride.accraw") as w:          # doctest: +SKIP
    ...     w.write(1767225600.125, b"\\xa5\\x5a...")
    """

    def __init__(self, target: str | os.PathLike | BinaryIO) -> None:
        if isinstance(target, str | os.PathLike):
            self.name = os.fspath(target)
            try:
                self._f: BinaryIO = open(self.name, "wb")  # noqa: SIM115 - closed in close()
            except OSError as exc:
                raise SourceError(
                    f"{self.name}: cannot create capture file: {exc.strerror}"
                ) from None
            self._owns = True
        else:
            self.name = getattr(target, "name", "<stream>")
            self._f = target
            self._owns = False
        self._f.write(MAGIC)
        self.records = 0
        self.bytes = 0

    def write(self, host_time: float, data: bytes) -> None:
        """Append one record: the bytes of one port read and its host arrival time (s)."""
        self._f.write(_HEADER.pack(float(host_time), len(data)))
        self._f.write(data)
        self.records += 1
        self.bytes += len(data)

    def mark_break(self, host_time: float) -> None:
        """Record that the link broke (adapter pulled) at ``host_time``: a zero-length record."""
        self.write(host_time, b"")

    def flush(self) -> None:
        self._f.flush()

    def close(self) -> None:
        if self._f.closed:
            return
        self._f.flush()
        if self._owns:
            self._f.close()

    def __enter__(self) -> CaptureWriter:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


class CaptureReader:
    """Read a serial capture file record by record, or in batches.

    Parameters
    ----------
    path : str or os.PathLike
        The capture file.

    Raises
    ------
    FormatError
        The file does not start with the magic ``ACCRAW1\\n``.
    SourceError
        The file cannot be opened.

    Notes
    -----
    Damage after the magic is never fatal: a cut mid-record, or a record length beyond the end
    of the file or above :data:`MAX_RECORD_BYTES`, ends the reading there with a one-line note
    naming the byte offset; every whole record before it is delivered. Host times going
    backwards are delivered as they are, with a note naming the record index.
    """

    def __init__(self, path: str | os.PathLike) -> None:
        self.name = os.fspath(path)
        try:
            self._f: BinaryIO = open(self.name, "rb")  # noqa: SIM115 - closed in close()
        except OSError as exc:
            raise SourceError(f"{self.name}: cannot open capture file: {exc.strerror}") from None
        self.size = os.fstat(self._f.fileno()).st_size
        head = self._f.read(len(MAGIC))
        if head != MAGIC:
            self._f.close()
            raise FormatError(f"{self.name}: offset 0: expected magic {MAGIC!r}, found {head!r}")
        self.offset = len(MAGIC)  # byte offset of the next record
        self.index = 0  # index of the next record
        self.notes: list[str] = []
        self.backwards = 0
        self.done = False
        self._last_time: float | None = None
        self._peeked: Record | None = None  # read ahead by read_until, not yet delivered

    def _note(self, text: str) -> None:
        if len(self.notes) < 20:
            self.notes.append(f"{self.name}: {text}")

    def read(self, max_records: int | None = None) -> list[Record]:
        """The next records (at most ``max_records``; all the rest when None). Empty at the end."""
        out: list[Record] = []
        while max_records is None or len(out) < max_records:
            rec = self._take()
            if rec is None:
                break
            out.append(rec)
        return out

    def read_until(self, host_time: float) -> list[Record]:
        """The next records whose host time is at most ``host_time`` (s), to keep a replay of
        the serial stream in step with the CAN log. A record with a time going backwards is
        delivered with its neighbours (arrival order is the order that matters)."""
        out: list[Record] = []
        while True:
            rec = self._take()
            if rec is None:
                return out
            if rec[0] > host_time:
                self._peeked = rec
                return out
            out.append(rec)

    def _take(self) -> Record | None:
        if self._peeked is not None:
            rec, self._peeked = self._peeked, None
            return rec
        if self.done:
            return None
        return self._next()

    def _next(self) -> Record | None:
        start = self.offset
        header = self._f.read(_HEADER.size)
        if len(header) == 0:
            self.done = True
            return None
        if len(header) < _HEADER.size:
            self._stop(f"offset {start}: file ends inside a record header ({len(header)} of "
                       f"{_HEADER.size} bytes); every whole record before it was kept")
            return None
        host_time, n = _HEADER.unpack(header)
        body_at = start + _HEADER.size
        if n > MAX_RECORD_BYTES:
            self._stop(f"offset {start}: record {self.index} claims {n} bytes (limit "
                       f"{MAX_RECORD_BYTES}); reading stops here")
            return None
        if body_at + n > self.size:
            have = self.size - body_at
            self._stop(f"offset {start}: file ends inside record {self.index} ({have} of {n} "
                       f"bytes); every whole record before it was kept")
            return None
        data = self._f.read(n)
        if len(data) < n:  # the file shrank while we read it
            self._stop(f"offset {start}: file ends inside record {self.index}")
            return None
        if self._last_time is not None and host_time < self._last_time:
            self.backwards += 1
            self._note(f"record {self.index} (offset {start}): host time goes backwards "
                       f"{self._last_time:.6f} -> {host_time:.6f} s")
        self._last_time = host_time
        self.offset = body_at + n
        self.index += 1
        return host_time, data

    def _stop(self, text: str) -> None:
        self._note(text)
        self.done = True

    def __iter__(self) -> Iterator[Record]:
        while True:
            rec = self._take()
            if rec is None:
                return
            yield rec

    def close(self) -> None:
        self._f.close()

    def __enter__(self) -> CaptureReader:
        return self

    def __exit__(self, *exc) -> None:
        self.close()
