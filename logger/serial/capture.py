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

import math
import mmap
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
#: A time far from the last good one is confirmed by the next record only on a real clock
#: (epoch seconds): near 0, random bytes make doubles close to each other far too often.
MIN_CLOCK = 1e6
#: A record's time follows the previous good one when it lies at most this much before /
#: after it, s; a time further off is taken only when the record after it follows it (a pause
#: or a host clock step, which the frame parser takes out), else it is damage.
NEAR_BACK_S = 5.0
NEAR_AHEAD_S = 2.0
#: After damage, a header close in time to the last good record (and no longer than a USB
#: read) is taken as the next record even if the one after it is damaged too.
RESYNC_NEAR_BYTES = 65536
#: A record longer than this is checked for a record starting inside it even when its length
#: leads to another record (a USB read is rarely longer).
LONG_READ_BYTES = 4096
#: Bytes searched at a time for the next record after a damaged one.
RESYNC_WINDOW = 1 << 16
#: Bytes before the next record kept mapped in memory, and the least handed back at a time.
RELEASE_MARGIN_BYTES = 1 << 20
RELEASE_STEP_BYTES = 4 << 20

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
        # records are read by offset (a damaged one sends the reading back and forth)
        self._map = mmap.mmap(self._f.fileno(), 0, access=mmap.ACCESS_READ)
        self.offset = len(MAGIC)  # byte offset of the next record
        self.index = 0  # index of the next record
        self.notes: list[str] = []
        self.backwards = 0
        self.bad_records = 0  # records skipped or resynchronised over
        self.bytes_lost = 0  # bytes that belong to no readable record
        self.done = False
        self._last_time: float | None = None
        self._peeked: Record | None = None  # read ahead by read_until, not yet delivered
        self._released = 0  # bytes at the start of the map handed back to the kernel

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
        self._release()
        return out

    def read_until(self, host_time: float) -> list[Record]:
        """The next records whose host time is at most ``host_time`` (s), to keep a replay of
        the serial stream in step with the CAN log. A record with a time going backwards is
        delivered with its neighbours (arrival order is the order that matters)."""
        out: list[Record] = []
        while True:
            if self._peeked is None and not self.done and self._plain_until(host_time, out):
                self._release()
                return out
            rec = self._take()
            if rec is None or rec[0] > host_time:
                self._peeked = rec
                self._release()
                return out
            out.append(rec)

    def _release(self) -> None:
        """Hand the pages of the records read back to the kernel: a mapped page once touched
        counts in the process's resident memory until unmapped, so an hour's capture read
        through the map would add its whole size to the peak (the replay's memory would grow
        with the ride). A later re-read of a released page (damage sends the reading back by
        a few records at most) faults it in again from the page cache."""
        behind = self.offset - RELEASE_MARGIN_BYTES
        upto = behind - behind % mmap.PAGESIZE
        if upto - self._released >= RELEASE_STEP_BYTES and hasattr(self._map, "madvise"):
            self._map.madvise(mmap.MADV_DONTNEED, self._released, upto - self._released)
            self._released = upto

    def _take(self) -> Record | None:
        if self._peeked is not None:
            rec, self._peeked = self._peeked, None
            return rec
        if self.done:
            return None
        return self._next()

    def _at(self, at: int, n: int) -> bytes:
        return self._map[at : at + n]

    def _header(self, at: int) -> tuple[float, int] | None:
        """The (time, length) of a plausible record header at byte ``at``, else None."""
        if at + _HEADER.size > self.size:
            return None
        t, n = _HEADER.unpack(self._at(at, _HEADER.size))
        if n > MAX_RECORD_BYTES or at + _HEADER.size + n > self.size:
            return None
        return t, n

    @staticmethod
    def _valid(t: float) -> bool:
        return math.isfinite(t) and 0.0 <= t < MAX_TIME  # seconds since the epoch (or 0)

    def _near(self, t: float, ref: float | None = None) -> bool:
        """``t`` follows ``ref`` (default: the last good record's time) as reads do."""
        ref = self._last_time if ref is None else ref
        if ref is None or abs(ref) < MIN_CLOCK:  # no real clock (tests): any valid time
            return self._valid(t)
        return self._valid(t) and -NEAR_BACK_S <= t - ref <= NEAR_AHEAD_S

    def _time_ok(self, t: float) -> bool:
        return self._near(t)

    def _next_header(self, at: int, n: int) -> tuple[float, int] | None | bool:
        """The raw header after a record of ``n`` bytes at ``at``; True at the file's exact end,
        None when the file ends inside it."""
        nxt = at + _HEADER.size + n
        if self.size - nxt < _HEADER.size:
            return True if nxt == self.size else None
        return _HEADER.unpack(self._at(nxt, _HEADER.size))

    def _chained(self, at: int, t: float, n: int, ref: float | None = None) -> bool:
        """The record at ``at`` ends exactly at the file's end, or where a record starts whose
        time follows this one's (or, when this one's is damaged, the last good one's)."""
        h2 = self._next_header(at, n)
        if h2 is True or h2 is None:
            return h2 is True
        t2, n2 = h2
        if ref is None:
            ref = t if self._near(t) else self._last_time
        return n2 <= MAX_RECORD_BYTES and self._near(t2, ref) if ref is not None \
            else n2 <= MAX_RECORD_BYTES and self._valid(t2)

    def _header_inside(self, start: int, n: int) -> int | None:
        """The first offset inside the body of the record at ``start`` (``n`` bytes) where a
        header whose time follows the last good one starts; None when there is none."""
        ref = self._last_time
        if ref is None:  # the first record: its own time is the reference
            ref = _HEADER.unpack(self._at(start, _HEADER.size))[0]
        if not (self._valid(ref) and ref >= MIN_CLOCK):
            return None
        # headers starting anywhere in the body (one may run past the claimed end)
        buf = np.frombuffer(self._at(start + 1, 2 * _HEADER.size + n - 2), np.uint8)
        k = len(buf) - _HEADER.size + 1
        if k <= 0:
            return None
        rows = np.lib.stride_tricks.sliding_window_view(buf, _HEADER.size)[:k]
        t = rows[:, :8].copy().view("<f8")[:, 0]
        with np.errstate(invalid="ignore"):
            d = t - ref
            hit = np.flatnonzero((d >= -NEAR_BACK_S) & (d <= NEAR_AHEAD_S))
        for j in hit:
            at = start + 1 + int(j)
            nn = int(rows[j, 8:12].copy().view("<u4")[0])
            if nn <= RESYNC_NEAR_BYTES and at + _HEADER.size + nn <= self.size:
                return at
        return None

    def _resync(self, start: int) -> int | None:
        """The next offset after ``start`` where a record begins: a header whose time follows
        the last good one (a random double lands there practically never), or two headers in
        a row that follow each other."""
        at = start + 1
        size = 256  # the next record is usually close: look near first, then further
        while at + _HEADER.size <= self.size:
            window = self._at(at, size + _HEADER.size)
            size = min(size * 4, RESYNC_WINDOW)
            if len(window) < _HEADER.size:
                return None
            buf = np.frombuffer(window, np.uint8)
            k = len(buf) - _HEADER.size + 1
            rows = np.lib.stride_tricks.sliding_window_view(buf, _HEADER.size)[:k]
            t = rows[:, :8].copy().view("<f8")[:, 0]
            n = rows[:, 8:12].copy().view("<u4")[:, 0].astype(np.int64)
            pos = at + np.arange(k)
            with np.errstate(invalid="ignore"):
                ok = np.isfinite(t) & (t >= 0) & (t < MAX_TIME) & (n <= MAX_RECORD_BYTES) \
                    & (pos + _HEADER.size + n <= self.size)
                near = np.zeros_like(ok)
                if self._last_time is not None and abs(self._last_time) >= MIN_CLOCK:
                    d = t - self._last_time
                    near = (d >= -NEAR_BACK_S) & (d <= NEAR_AHEAD_S) & (n <= RESYNC_NEAR_BYTES)
            for j in np.flatnonzero(ok):  # near, or followed by a record near it
                tj = float(t[j])
                if near[j] or (abs(tj) >= MIN_CLOCK or self._last_time is None) and \
                        self._chained(int(pos[j]), tj, int(n[j]), ref=tj):
                    return int(pos[j])
            at += k
        return None

    def _next(self) -> Record | None:
        rec = self._next_plain()
        return rec if rec is not None else self._next_checked()

    def _next_plain(self) -> Record | None:
        """The next record when it is plainly whole (the common case, without method calls):
        a short read whose time follows the last good one, not backwards, and that ends at the
        file's end or where the next record's header follows it in time. None leaves every
        other case to :meth:`_next_checked`, which judges it the same way, step by step."""
        start, size, last = self.offset, self.size, self._last_time
        if last is None or last < MIN_CLOCK or start + _HEADER.size > size:
            return None
        t, n = _HEADER.unpack_from(self._map, start)
        end = start + _HEADER.size + n
        if not (last <= t <= last + NEAR_AHEAD_S and t < MAX_TIME and n <= LONG_READ_BYTES
                and end <= size):
            return None
        if end != size:
            if size - end < _HEADER.size:
                return None
            t2, n2 = _HEADER.unpack_from(self._map, end)
            if not (n2 <= MAX_RECORD_BYTES and -NEAR_BACK_S <= t2 - t <= NEAR_AHEAD_S
                    and 0.0 <= t2 < MAX_TIME):
                return None
        self._last_time = t
        self.offset = end
        self.index += 1
        return t, self._map[start + _HEADER.size : end]

    def _plain_until(self, host_time: float, out: list[Record]) -> bool:
        """Append the plainly whole records (as :meth:`_next_plain` takes them) with host time
        at most ``host_time`` to ``out``, in one tight loop (a replay reads tens of thousands of
        records a minute). True when it stopped at a later record (now peeked); False at the
        first record that is not plain, left to the checked path."""
        m, size, unpack = self._map, self.size, _HEADER.unpack_from
        start, last, index = self.offset, self._last_time, self.index
        h = _HEADER.size
        found = False
        while last is not None and last >= MIN_CLOCK and start + h <= size:
            t, n = unpack(m, start)
            end = start + h + n
            if not (last <= t <= last + NEAR_AHEAD_S and t < MAX_TIME and n <= LONG_READ_BYTES
                    and end <= size):
                break
            if end != size:
                if size - end < h:
                    break
                t2, n2 = unpack(m, end)
                if not (n2 <= MAX_RECORD_BYTES and -NEAR_BACK_S <= t2 - t <= NEAR_AHEAD_S
                        and 0.0 <= t2 < MAX_TIME):
                    break
            rec = (t, m[start + h : end])
            last, start, index = t, end, index + 1
            if t > host_time:
                self._peeked = rec
                found = True
                break
            out.append(rec)
        self.offset, self._last_time, self.index = start, last, index
        return found

    def _next_checked(self) -> Record | None:
        start = self.offset
        if start >= self.size:
            self.done = True
            return None
        if start + _HEADER.size > self.size:
            self._stop(f"offset {start}: file ends inside a record header "
                       f"({self.size - start} of {_HEADER.size} bytes); every whole record "
                       "before it was kept")
            self.bytes_lost += self.size - start
            return None
        h = self._header(start)
        if h is None:
            return self._damaged(start, h)
        host_time, n = h
        chained = self._chained(start, host_time, n)
        # a record starting inside this one's body means its length is wrong (looked for
        # where the length does not lead to a record, or is longer than reads usually are)
        inner = self._header_inside(start, n) if not chained or n > LONG_READ_BYTES else None
        if inner is not None:
            return self._damaged(start, h, inner)
        if not self._near(host_time):
            # a pause or a clock step when the next record follows this one; else a damaged
            # time (whole record: bytes kept) or a damaged header (resynchronise)
            h2 = self._next_header(start, n)
            if isinstance(h2, tuple) and self._valid(host_time) and abs(host_time) >= MIN_CLOCK \
                    and self._near(h2[0], host_time):
                pass  # confirmed by the record after it
            elif chained or self._chained(start, math.nan, n):
                return self._bad_time(start, host_time, n, self._at(start + _HEADER.size, n))
            else:
                return self._damaged(start, h)
        data = self._at(start + _HEADER.size, n)
        if self._last_time is not None and host_time < self._last_time:
            self.backwards += 1
            self._note(f"record {self.index} (offset {start}): host time goes backwards "
                       f"{self._last_time:.6f} -> {host_time:.6f} s")
        # the reference only moves forward (a stamp slightly back is taken, a lagging
        # reference would make every record after it look far off)
        self._last_time = host_time if self._last_time is None or not self._near(host_time) \
            else max(self._last_time, host_time)
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

    def _damaged(self, start: int, h: tuple[float, int] | None, nxt: int | None = None
                 ) -> Record | None:
        """A record whose length cannot be right: find where the records go on.

        The bytes up to there are kept with the record's time when that time is plausible
        (only the length was hit; the frame parser checks every frame in them); where no
        record follows (the file was cut), reading stops and the cut record is left out.
        """
        self.bad_records += 1
        t, n = _HEADER.unpack(self._at(start, _HEADER.size))
        have = self.size - start - _HEADER.size
        if n > MAX_RECORD_BYTES:
            why = f"record {self.index} claims {n} bytes (limit {MAX_RECORD_BYTES})"
        elif n > have:
            why = f"file ends inside record {self.index} ({have} of {n} bytes)"
        else:
            why = f"record {self.index} of {n} bytes is not followed by another record"
        nxt = self._resync(start) if nxt is None else nxt
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
        data = self._at(start + _HEADER.size, nxt - start - _HEADER.size)
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
        self._map.close()
        self._f.close()

    def __enter__(self) -> CaptureReader:
        return self

    def __exit__(self, *exc) -> None:
        self.close()
