"""The one source interface of the analysis: a stream of :class:`~logger.chunks.Chunk`.

:func:`replay` reads recordings, :func:`live` reads a python-can bus and serial ports (and may
record them). Both feed the same merger, so the same data give the same chunks:

* CAN frames go through :class:`~logger.can.decode.FrameDecoder` in arrival order.
* Chunk boundaries sit at whole multiples of ``chunk_s`` on the CAN clock. A frame belongs to
  the chunk of the latest CAN time seen so far (the running maximum of the timestamps), so a
  frame arriving with an earlier time stays in the open chunk, and a quiet spell on the bus
  makes one longer chunk rather than many empty ones. A chunk closes when the first frame of a
  later chunk arrives (or the stream ends); ``end_time`` is its upper boundary.
* When a chunk closing at ``E`` is handed out, each sensor's
  :class:`~logger.serial.decoder.SerialDecoder` has been fed exactly the serial reads with host
  time ``<= E`` (up to the first later one, in arrival order); the chunk carries the samples it
  released. Samples are released after the aligner's bounded lookahead, so the accelerometer
  blocks trail the CAN data by that lookahead (about one to two clock windows); at the end of
  the stream everything held is flushed into the last chunk.
* Live, a chunk closing at ``E`` waits until the host clock passes ``E +``
  :data:`LIVE_SERIAL_MARGIN_S` so that every serial read stamped ``<= E`` has been queued: a
  live bus must stamp frames with the host clock (``time.time()``: socketcan and python-can's
  virtual bus do).
"""

from __future__ import annotations

import dataclasses
import os
import threading
import time
from collections.abc import Callable, Iterator

import can
import numpy as np

from crankbeat.errors import UsageError
from crankbeat.logger.can.decode import FrameDecoder
from crankbeat.logger.can.guard import FrameGuard
from crankbeat.logger.can.sources import BusSource, CanSource, FrameBatch, open_log
from crankbeat.logger.chunks import AccelBlock, Chunk, StatusBlock, StreamHealth, TeethBlock
from crankbeat.logger.recorder import Recorder
from crankbeat.logger.rig.model import CanBus, Rig
from crankbeat.logger.serial.capture import CaptureReader
from crankbeat.logger.serial.decoder import SerialDecoder
from crankbeat.logger.serial.port import PortReader

Record = tuple[float, bytes]
#: Live: how long after a chunk's end the host clock must be before its serial reads are taken.
LIVE_SERIAL_MARGIN_S = 0.03
#: Live: a wait longer than this means the bus stamps with another clock: do not wait then.
LIVE_MAX_WAIT_S = 1.0
#: After a stop, how long the frames still queued on the bus are taken in, s.
LIVE_DRAIN_S = 2.0
#: Frames per CAN batch read from a source.
BATCH_FRAMES = 65536

# sensor name -> reads; called with a chunk end (reads up to it) or None (all that is left)
SerialFeed = Callable[[float | None], dict[str, list[Record]]]


# ------------------------------------------------------------------------- blocks
def _slice(b: FrameBatch, a: int, z: int) -> FrameBatch:
    return FrameBatch(ts=b.ts[a:z], can_id=b.can_id[a:z], extended=b.extended[a:z],
                      dlc=b.dlc[a:z], data=b.data[a:z], is_error=b.is_error[a:z],
                      is_remote=b.is_remote[a:z], is_fd=b.is_fd[a:z], index=b.index[a:z],
                      origin=b.origin, index_kind=b.index_kind)


def _cat_teeth(parts: list[TeethBlock], empty: TeethBlock) -> TeethBlock:
    parts = [p for p in parts if len(p)]
    if not parts:
        return empty
    if len(parts) == 1:
        return parts[0]
    return TeethBlock(*(np.concatenate([getattr(p, f.name) for p in parts])
                        for f in dataclasses.fields(TeethBlock)))


def _cat_status(parts: list[StatusBlock], empty: StatusBlock) -> StatusBlock:
    parts = [p for p in parts if len(p)]
    if not parts:
        return empty
    if len(parts) == 1:
        return parts[0]
    return StatusBlock(t=np.concatenate([p.t for p in parts]),
                       values={r: np.concatenate([p.values[r] for p in parts])
                               for r in parts[0].values})


def _cat_accel(sensor: str, parts: list[AccelBlock]) -> AccelBlock:
    parts = [p for p in parts if len(p)]
    if len(parts) == 1:
        return parts[0]
    if not parts:
        return AccelBlock(sensor, np.zeros(0), np.zeros((0, 3)), np.zeros(0, bool))
    return AccelBlock(sensor, np.concatenate([p.t for p in parts]),
                      np.concatenate([p.xyz for p in parts]),
                      np.concatenate([p.gap_before for p in parts]))


def _snapshot(h: StreamHealth) -> StreamHealth:
    copies = {f.name: type(v)(v) for f in dataclasses.fields(h)
              if isinstance(v := getattr(h, f.name), dict | list)}
    return dataclasses.replace(h, **copies)


# ------------------------------------------------------------------------- merger
class _Merger:
    """CAN batches + serial reads -> chunks; the part replay and live share."""

    def __init__(self, rig: Rig, sensors: list[str], chunk_s: float,
                 note_sources: list[Callable[[], list[str]]], *, coalesce: bool = False) -> None:
        if not (isinstance(chunk_s, int | float) and chunk_s > 0 and np.isfinite(chunk_s)):
            raise UsageError(f"chunk_s must be a positive number of seconds, got {chunk_s!r}")
        self.chunk_s = float(chunk_s)
        # live: the chunks a batch completes close as one (see _segments)
        self.coalesce = coalesce
        self.decoder = FrameDecoder(rig)
        self.health = self.decoder.health
        self.guard = FrameGuard(self.health)
        self.serial = {n: SerialDecoder(rig.sensor(n)) for n in sensors}
        self._note_sources = [*note_sources, *[(lambda d=d: d.notes) for d in
                                               self.serial.values()]]
        self._notes_taken = [0] * len(self._note_sources)
        self._open: int | None = None
        self._runmax = -np.inf
        self._teeth: list[TeethBlock] = []
        self._status: list[StatusBlock] = []
        self.last_end: float | None = None

    def run(self, batches: Iterator[FrameBatch], feed: SerialFeed) -> Iterator[Chunk]:
        for raw in batches:
            batch = self.guard.push(raw)
            if not len(batch):
                continue
            ts = np.where(np.isfinite(batch.ts), batch.ts, -np.inf)
            cm = np.maximum.accumulate(np.maximum(ts, self._runmax))
            self._runmax = float(cm[-1])
            ids = np.floor(cm / self.chunk_s).astype(np.int64)
            for a, z in self._segments(ids):
                if self._open is not None and int(ids[a]) != self._open:
                    yield self._close(feed, final=False)
                self._open = int(ids[z - 1])
                t, s = self.decoder.push(_slice(batch, a, z))
                self._teeth.append(t)
                self._status.append(s)
        self.guard.finish()
        self.decoder.finish()
        if self._open is not None or self.serial:
            yield self._close(feed, final=True)

    def _segments(self, ids: np.ndarray) -> list[tuple[int, int]]:
        """Index ranges of a batch that go into one chunk each, from the chunk ids of its frames.

        Replay: one range per chunk id. Live (``coalesce``): a batch is what the bus queued
        since the last read, so one that spans several chunk boundaries means the analysis fell
        behind; every chunk it completes then closes as one (its end the last boundary), and
        the analysis catches up in one step instead of paying its per-step cost for each. The
        verdicts do not depend on where chunks end (streaming == whole-array).
        """
        cuts = [0, *(np.flatnonzero(np.diff(ids)) + 1).tolist(), len(ids)]
        if self.coalesce and len(cuts) > 3:
            cuts = [0, cuts[-2], len(ids)]
        return list(zip(cuts[:-1], cuts[1:], strict=True))

    def _close(self, feed: SerialFeed, *, final: bool) -> Chunk:
        if self._open is None:  # no CAN at all: one chunk with whatever the serial side had
            end = float("nan")
        else:
            end = (self._open + 1) * self.chunk_s
        reads = feed(None if final else end)
        accel = {}
        for name, dec in self.serial.items():
            parts = [dec.push(reads.get(name, []))]
            if final:
                parts.append(dec.flush())
            accel[name] = _cat_accel(name, parts)
            h = self.health
            h.serial_good[name] = dec.health.good
            h.serial_corrupt[name] = dec.health.corrupt
            h.serial_lost[name] = dec.health.lost
            h.serial_reconnects[name] = dec.health.reconnects
            h.serial_time_steps[name] = dec.health.host_steps
            h.serial_bad_records[name] = dec.health.bad_records
            h.serial_bytes_lost[name] = dec.health.bytes_lost
        for i, src in enumerate(self._note_sources):
            notes = src()
            self.health.notes.extend(notes[self._notes_taken[i]:])
            self._notes_taken[i] = len(notes)
        chunk = Chunk(
            teeth=_cat_teeth(self._teeth, self.decoder.empty_teeth()),
            status=_cat_status(self._status, self.decoder.empty_status()),
            accel=accel,
            health=_snapshot(self.health),
            end_time=end,
        )
        self._teeth, self._status = [], []
        self.last_end = end
        return chunk


# ------------------------------------------------------------------------- stream
class Stream(Iterator[Chunk]):
    """An iterator of chunks that also tells its progress and owns its sources.

    ``progress`` is ``(done, total)``: bytes of the CAN log for a replay, seconds since the
    start (total None) for a live run. Use as a context manager, or call :meth:`close`.
    """

    def __init__(self, gen: Iterator[Chunk], progress: Callable[[], tuple[float, float | None]],
                 closers: list[Callable[[], None]]) -> None:
        self._gen = gen
        self._progress = progress
        self._closers = closers
        self._closed = False

    def __iter__(self) -> Stream:
        return self

    def __next__(self) -> Chunk:
        try:
            return next(self._gen)
        except BaseException:
            self.close()
            raise

    @property
    def progress(self) -> tuple[float, float | None]:
        return self._progress()

    def close(self) -> None:
        """Stop the stream and release every file, bus, port and thread it opened."""
        if self._closed:
            return
        self._closed = True
        try:
            self._gen.close()  # type: ignore[attr-defined]
        finally:
            for c in reversed(self._closers):
                c()

    def __enter__(self) -> Stream:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _check_sensors(rig: Rig, names: list[str]) -> None:
    known = [s.name for s in rig.sensors]
    for n in names:
        if n not in known:
            raise UsageError(f"rig {rig.name!r} has no serial sensor {n!r} "
                             f"(has: {', '.join(known) or 'none'})")


def _paced(chunks: Iterator[Chunk], pace: float | None) -> Iterator[Chunk]:
    if pace is None:
        yield from chunks
        return
    wall0 = t0 = None
    for ch in chunks:
        if np.isfinite(ch.end_time):
            if t0 is None:
                t0, wall0 = ch.end_time, time.monotonic()
            else:
                wait = wall0 + (ch.end_time - t0) / pace - time.monotonic()
                if wait > 0:
                    time.sleep(wait)
        yield ch


def replay(
    rig: Rig,
    can_path: str | os.PathLike,
    accel: dict[str, str | os.PathLike] | None = None,
    *,
    pace: float | None = None,
    chunk_s: float = 0.2,
    fast: bool = True,
) -> Stream:
    """Chunks from recordings: a CAN log and one serial capture file per sensor.

    Parameters
    ----------
    rig : Rig
        The rig the recordings come from.
    can_path : str or os.PathLike
        CAN log in any format python-can reads (see :func:`logger.can.sources.open_log`).
    accel : dict of sensor name -> capture file path, optional
        Serial capture files (``ACCRAW1`` format); None or {} for no accelerometer.
    pace : float, optional
        1.0 replays at ride speed (sleeping to the wall clock), 2.0 twice as fast; None (the
        default) as fast as possible.
    chunk_s : float
        Chunk length on the CAN clock, s.
    fast : bool
        Use the numpy candump parser for ``.log`` files.

    Returns
    -------
    Stream
        Iterator of :class:`~logger.chunks.Chunk` with a ``progress`` (bytes read, bytes total).
    """
    if pace is not None and not pace > 0:
        raise UsageError(f"pace must be a positive speed factor or None, got {pace!r}")
    accel = dict(accel or {})
    _check_sensors(rig, list(accel))
    closers: list[Callable[[], None]] = []
    try:
        source = open_log(can_path, fast=fast)
        closers.append(source.close)
        readers = {}
        for name, path in accel.items():
            readers[name] = CaptureReader(path)
            closers.append(readers[name].close)
    except BaseException:
        for c in reversed(closers):
            c()
        raise
    merger = _Merger(rig, list(accel), chunk_s,
                     [lambda: source.notes, *[(lambda r=r: r.notes) for r in readers.values()]])

    def feed(end: float | None) -> dict[str, list[Record]]:
        out = {n: (r.read() if end is None else r.read_until(end)) for n, r in readers.items()}
        for n, r in readers.items():  # the file's damage counts as the sensor's
            merger.serial[n].health.bad_records = r.bad_records
            merger.serial[n].health.bytes_lost = r.bytes_lost
        return out

    gen = _paced(merger.run(source.batches(BATCH_FRAMES), feed), pace)
    return Stream(gen, source.progress, closers)


def live(
    rig: Rig,
    bus: CanBus | can.BusABC | None = None,
    ports: dict[str, str] | None = None,
    *,
    record_dir: str | os.PathLike | None = None,
    chunk_s: float = 0.2,
    stop: threading.Event | None = None,
    record_stem: str | None = None,
    can_suffix: str = ".log",
) -> Stream:
    """Chunks from a live CAN bus and serial ports, optionally recorded as they are read.

    Parameters
    ----------
    rig : Rig
        The rig; its ``can_bus`` is used when ``bus`` is None.
    bus : CanBus or can.BusABC, optional
        Where the bus is (opened and shut down here), or an open python-can bus (left open).
    ports : dict of sensor name -> pyserial URL, optional
        One port per sensor to read (``/dev/ttyUSB0``, ``socket://127.0.0.1:5000``, ...).
    record_dir : str or os.PathLike, optional
        Record everything read into this directory (see :class:`~logger.recorder.Recorder`).
    chunk_s : float
        Chunk length on the CAN clock, s.
    stop : threading.Event, optional
        Set it to end the stream; the last chunk then carries everything still held.
    record_stem, can_suffix : optional
        Passed to the :class:`~logger.recorder.Recorder`.

    Returns
    -------
    Stream
        Iterator of chunks; ``progress`` is (seconds since start, None).
    """
    ports = dict(ports or {})
    _check_sensors(rig, list(ports))
    stop = stop if stop is not None else threading.Event()
    closers: list[Callable[[], None]] = []
    try:
        recorder = None
        if record_dir is not None:
            recorder = Recorder(record_dir, rig, can_suffix=can_suffix, stem=record_stem,
                                sensors=list(ports))
            closers.append(recorder.close)
        source: CanSource = BusSource(bus if bus is not None else rig.can_bus)
        closers.append(source.close)
        readers: dict[str, PortReader] = {}
        for name, url in ports.items():
            readers[name] = PortReader(url, rig.sensor(name).baud)
            closers.append(readers[name].close)
    except BaseException:
        for c in reversed(closers):
            c()
        raise
    merger = _Merger(rig, list(ports), chunk_s, [lambda: source.notes], coalesce=True)
    held: dict[str, list[Record]] = {n: [] for n in readers}
    started = time.monotonic()

    def take(name: str) -> None:
        new = readers[name].read_available()
        if new:
            if recorder is not None:
                recorder.write_serial(name, new)
            held[name].extend(new)

    clock_noted = False

    def feed(end: float | None) -> dict[str, list[Record]]:
        nonlocal clock_noted
        out: dict[str, list[Record]] = {}
        if end is not None and readers:
            wait = end + LIVE_SERIAL_MARGIN_S - time.time()
            if wait > LIVE_MAX_WAIT_S:  # the bus stamps with another clock: do not stall
                if not clock_noted:
                    clock_noted = True
                    merger.health.notes.append(
                        f"{source.origin}: frame times run {wait:.1f} s ahead of the host "
                        "clock; serial reads are split into chunks as they arrive, so a "
                        "replay of this run may differ slightly")
            elif wait > 0:
                time.sleep(wait)
        for name in readers:
            take(name)
            recs = held[name]
            if end is None:
                k = len(recs)
            else:  # the prefix up to the first read after `end`, as a replay reads it
                k = next((i for i, r in enumerate(recs) if r[0] > end), len(recs))
            out[name], held[name] = recs[:k], recs[k:]
        return out

    def batches() -> Iterator[FrameBatch]:
        assert isinstance(source, BusSource)
        while not stop.is_set():
            b = source.recv_batch(BATCH_FRAMES)
            if len(b) and recorder is not None:
                recorder.write_can(b)
            for name in readers:  # keep the recording current even when no chunk closes
                take(name)
            if recorder is not None:
                recorder.maybe_flush()  # also while the bus is quiet
            yield b
        # frames already queued when the rider stopped belong to the ride (and its recording);
        # bounded in time, since a busy bus never runs dry
        drain_end = time.monotonic() + LIVE_DRAIN_S
        while time.monotonic() < drain_end:
            b = source.recv_batch(BATCH_FRAMES)
            if not len(b):
                break
            if recorder is not None:
                recorder.write_can(b)
            yield b

    def progress() -> tuple[float, float | None]:
        return time.monotonic() - started, None

    out = Stream(merger.run(batches(), feed), progress, closers)
    out.recorder = recorder  # the live ride shows a recording that stopped (disk full)
    return out
