"""Serial capture files: the raw bytes of a port with their host arrival times.

Format (crankbeat's own, see RIG.md): the 8-byte magic ``ACCRAW1\\n``, then records of
``float64 LE host time (s) | uint32 LE byte count n | n raw bytes``. Host times are on the
same clock as the CAN log's timestamps (``time.time()`` for live python-can buses), so a replay
sees exactly what the live run saw. A zero-length record marks a break in the link (the
adapter was pulled and reopened): the bytes on either side do not belong together.

A file may end mid-record (power lost during a ride); :class:`CaptureReader` keeps every whole
record before the cut and says where the cut is in :attr:`CaptureReader.notes`.
"""

from __future__ import annotations

import math
import os
import struct
from collections.abc import Iterator
from typing import BinaryIO

import numpy as np

from crankbeat.errors import FormatError, SourceError

MAGIC = b"ACCRAW1\n"
_HEADER = struct.Struct("<dI")
#: A record claiming more than this is taken as corruption, not data (a USB read is KiB).
MAX_RECORD_BYTES = 16 * 1024 * 1024
#: Host times are epoch seconds (or seconds from 0 in tests): anything beyond is damage.
MAX_TIME = 1e11
#: A record's time may lie this much before / after the previous good one, s (a clock step
#: the aligner handles; a damaged time is far off).
MAX_BACK_S = 3600.0
MAX_AHEAD_S = 86400.0
#: Bytes searched at a time for the next record after a damaged one.
RESYNC_WINDOW = 1 << 16

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
        self.bad_records = 0  # records skipped or resynchronised over
        self.bytes_lost = 0  # bytes that belong to no readable record
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

    def _header(self, at: int) -> tuple[float, int] | None:
        """The (time, length) of a plausible record header at byte ``at``, else None."""
        if at + _HEADER.size > self.size:
            return None
        self._f.seek(at)
        t, n = _HEADER.unpack(self._f.read(_HEADER.size))
        if n > MAX_RECORD_BYTES or at + _HEADER.size + n > self.size:
            return None
        return t, n

    def _time_ok(self, t: float) -> bool:
        if not (math.isfinite(t) and abs(t) < MAX_TIME):
            return False
        last = self._last_time
        return last is None or -MAX_BACK_S <= t - last <= MAX_AHEAD_S

    def _chained(self, at: int, t: float, n: int) -> bool:
        """The record at ``at`` ends exactly at the file's end, or where the header of
        another plausible record starts."""
        nxt = at + _HEADER.size + n
        if self.size - nxt < _HEADER.size:
            return nxt == self.size
        self._f.seek(nxt)
        t2, n2 = _HEADER.unpack(self._f.read(_HEADER.size))
        ref = t if self._time_ok(t) else self._last_time
        if ref is None:
            return n2 <= MAX_RECORD_BYTES and math.isfinite(t2) and abs(t2) < MAX_TIME
        return n2 <= MAX_RECORD_BYTES and math.isfinite(t2) and \
            -MAX_BACK_S <= t2 - ref <= MAX_AHEAD_S

    def _resync(self, start: int) -> int | None:
        """The next offset after ``start`` where a plausible chain of records begins."""
        at = start + 1
        while at + _HEADER.size <= self.size:
            self._f.seek(at)
            window = self._f.read(RESYNC_WINDOW + _HEADER.size)
            if len(window) < _HEADER.size:
                return None
            buf = np.frombuffer(window, np.uint8)
            k = len(buf) - _HEADER.size + 1
            rows = np.lib.stride_tricks.sliding_window_view(buf, _HEADER.size)[:k]
            t = rows[:, :8].copy().view("<f8")[:, 0]
            n = rows[:, 8:12].copy().view("<u4")[:, 0].astype(np.int64)
            pos = at + np.arange(k)
            ok = np.isfinite(t) & (np.abs(t) < MAX_TIME) & (n <= MAX_RECORD_BYTES) \
                & (pos + _HEADER.size + n <= self.size)
            if self._last_time is not None:
                with np.errstate(invalid="ignore"):
                    d = t - self._last_time
                ok &= (d >= -MAX_BACK_S) & (d <= MAX_AHEAD_S)
            for j in np.flatnonzero(ok):
                if self._chained(int(pos[j]), float(t[j]), int(n[j])):
                    return int(pos[j])
            at += k
        return None

    def _next(self) -> Record | None:
        start = self.offset
        if start >= self.size:
            self.done = True
            return None
        if start + _HEADER.size > self.size:
            self._stop(f"offset {start}: file ends inside a record header "
                       f"({self.size - start} of {_HEADER.size} bytes); every whole record "
                       "before it was kept")
            return None
        h = self._header(start)
        if h is None or not (self._time_ok(h[0]) or self._chained(start, *h)):
            return self._damaged(start, h)
        host_time, n = h
        self._f.seek(start + _HEADER.size)
        data = self._f.read(n)
        if not self._time_ok(host_time):  # a whole record with only its time hit
            return self._bad_time(start, host_time, n, data)
        if self._last_time is not None and host_time < self._last_time:
            self.backwards += 1
            self._note(f"record {self.index} (offset {start}): host time goes backwards "
                       f"{self._last_time:.6f} -> {host_time:.6f} s")
        self._last_time = host_time
        self.offset = start + _HEADER.size + n
        self.index += 1
        return host_time, data

    def _bad_time(self, start: int, host_time: float, n: int, data: bytes) -> Record | None:
        """A whole record whose time cannot be right: its bytes are kept with the time of the
        record after it (a read never arrives before it is taken, so a later time cannot pull
        the clock fit below the truth), or of the one before it at the end of the file."""
        self.bad_records += 1
        self.offset = start + _HEADER.size + n
        self.index += 1
        nxt = self._header(self.offset)
        t = nxt[0] if nxt is not None and self._time_ok(nxt[0]) else self._last_time
        self._note(f"record {self.index - 1} (offset {start}): host time {host_time!r} is not "
                   f"plausible; its {n} bytes are kept with the time "
                   f"{'of a neighbour' if t is not None else '(none: skipped)'}")
        if t is None:
            self.bytes_lost += n
            return self._next()
        self._last_time = t
        return t, data

    def _damaged(self, start: int, h: tuple[float, int] | None) -> Record | None:
        """A record whose length cannot be right: find where the records go on.

        The bytes up to there are kept with the record's time when that time is plausible
        (only the length was hit; the frame parser checks every frame in them); where no
        record follows (the file was cut), reading stops and the cut record is left out.
        """
        self.bad_records += 1
        self._f.seek(start)
        t, n = _HEADER.unpack(self._f.read(_HEADER.size))
        have = self.size - start - _HEADER.size
        if n > MAX_RECORD_BYTES:
            why = f"record {self.index} claims {n} bytes (limit {MAX_RECORD_BYTES})"
        elif n > have:
            why = f"file ends inside record {self.index} ({have} of {n} bytes)"
        else:
            why = f"record {self.index} of {n} bytes is not followed by another record"
        nxt = self._resync(start)
        if nxt is None:
            self.bytes_lost += self.size - start
            self._stop(f"offset {start}: {why}; no record follows it: every whole record "
                       "before it was kept")
            return None
        keep = self._time_ok(t) and nxt > start + _HEADER.size
        self.bytes_lost += _HEADER.size if keep else nxt - start
        self._note(f"offset {start}: {why}; records go on at offset {nxt}; "
                   + ("its bytes up to there are kept" if keep
                      else f"{nxt - start} bytes skipped"))
        self.offset = nxt
        self.index += 1
        if not keep:
            return self._next()
        self._f.seek(start + _HEADER.size)
        data = self._f.read(nxt - start - _HEADER.size)
        self._last_time = t
        return t, data

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
