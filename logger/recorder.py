"""Record what a live run reads: CAN frames through python-can's writers, serial bytes through
capture files, flushed to disk at least once a second (a power cut loses at most ~1 s).

Files in ``out_dir``: ``<stem><can_suffix>`` (candump ``.log`` by default; any suffix python-can
writes) and ``<stem>.<sensor>.acraw`` per serial sensor (docs/rig.md's capture format). Replaying
them through :func:`logger.stream.replay` gives the same chunks as the live run.
"""

from __future__ import annotations

import os
import time
from pathlib import Path

import can

from crankbeat.errors import SourceError, UsageError
from crankbeat.logger.can.sources.base import FrameBatch
from crankbeat.logger.rig.model import Rig
from crankbeat.logger.serial.capture import CaptureWriter

#: Longest time between two flushes to disk, s.
FLUSH_EVERY_S = 1.0


class Recorder:
    """Write a live run's CAN frames and serial reads to files.

    Parameters
    ----------
    out_dir : str or os.PathLike
        Directory for the files (created if missing).
    rig : Rig
        The rig; one capture file is opened per serial sensor it lists.
    can_suffix : str
        CAN log format, by python-can's writer for that suffix (``.log``, ``.asc``, ``.blf``,
        ``.csv``, ``.trc``).
    stem : str, optional
        File name stem; default ``"run-<UTC date and time>"``.
    sensors : iterable of str, optional
        Only these sensors get a capture file (default: every sensor of the rig).

    Notes
    -----
    Files are flushed and ``fsync``-ed at most :data:`FLUSH_EVERY_S` after a write. Binary BLF
    files buffer whole containers inside python-can; a cut BLF may lose more than that.
    """

    def __init__(
        self,
        out_dir: str | os.PathLike,
        rig: Rig,
        *,
        can_suffix: str = ".log",
        stem: str | None = None,
        sensors: list[str] | None = None,
    ) -> None:
        self.out_dir = Path(out_dir)
        self.rig = rig
        if not can_suffix.startswith("."):
            raise UsageError(f"can_suffix must start with '.', got {can_suffix!r}")
        stem = stem or time.strftime("run-%Y%m%d-%H%M%S", time.gmtime())
        names = [s.name for s in rig.sensors] if sensors is None else list(sensors)
        known = {s.name for s in rig.sensors}
        for n in names:
            if n not in known:
                self._no_sensor(n)
        try:
            self.out_dir.mkdir(parents=True, exist_ok=True)
        except OSError as exc:
            raise SourceError(f"{self.out_dir}: cannot create recording directory: "
                              f"{exc.strerror}") from None
        self.can_path = self.out_dir / f"{stem}{can_suffix}"
        self.serial_paths = {n: self.out_dir / f"{stem}.{n}.acraw" for n in names}
        try:
            self._can = can.Logger(str(self.can_path))
        except ValueError as exc:
            raise UsageError(f"cannot record CAN as {can_suffix!r}: {exc}") from None
        self._serial: dict[str, CaptureWriter] = {}
        self._closed = False
        try:
            for n, p in self.serial_paths.items():
                self._serial[n] = CaptureWriter(p)
        except Exception:
            self.close()
            raise
        self.frames = 0
        self.serial_records = {n: 0 for n in names}
        self._last_flush = time.monotonic()

    def _no_sensor(self, name: str) -> None:
        known = ", ".join(s.name for s in self.rig.sensors) or "none"
        raise UsageError(f"rig {self.rig.name!r} has no serial sensor {name!r} (has: {known})")

    def write_can(self, frames: FrameBatch | list[can.Message]) -> None:
        """Append CAN frames (a batch from a source, or python-can messages)."""
        msgs = frames.to_messages() if isinstance(frames, FrameBatch) else frames
        for msg in msgs:
            self._can.on_message_received(msg)
        self.frames += len(msgs)
        self.maybe_flush()

    def write_serial(self, sensor: str, records: list[tuple[float, bytes]]) -> None:
        """Append serial reads ``(host_time, bytes)`` of one sensor (zero length = link break)."""
        w = self._serial.get(sensor)
        if w is None:
            self._no_sensor(sensor)
        assert w is not None
        for t, data in records:
            w.write(t, data)
        self.serial_records[sensor] += len(records)
        self.maybe_flush()

    def maybe_flush(self) -> None:
        """Flush if the last flush is :data:`FLUSH_EVERY_S` old (call it while idle, too)."""
        if self._closed:
            return
        if time.monotonic() - self._last_flush >= FLUSH_EVERY_S:
            self.flush()

    def flush(self) -> None:
        """Push everything written so far to the disk."""
        f = getattr(self._can, "file", None)
        if f is not None and not f.closed:
            f.flush()
            _fsync(f)
        for w in self._serial.values():
            w.flush()
            _fsync(getattr(w, "_f", None))
        self._last_flush = time.monotonic()

    def close(self) -> None:
        """Flush and close every file. Safe to call twice."""
        if getattr(self, "_closed", True):
            return
        self._closed = True
        try:
            self._can.stop()
        finally:
            for w in self._serial.values():
                w.close()

    def __enter__(self) -> Recorder:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _fsync(f: object) -> None:
    try:
        os.fsync(f.fileno())  # type: ignore[union-attr]
    except (AttributeError, OSError, ValueError):
        pass  # not a real file (a pipe, a buffer): nothing to sync
