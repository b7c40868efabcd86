"""Record what a live run reads: CAN frames through python-can's writers, serial bytes through
capture files, flushed to disk at least once a second (a power cut loses at most ~1 s).

A recording that cannot be written (disk full, the stick pulled out) stops the recording, not
the ride: :attr:`Recorder.failure` says why, and what arrives afterwards is counted in
:attr:`Recorder.frames_not_recorded` / :attr:`Recorder.reads_not_recorded`.

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
        self.failure: str | None = None  # why the recording stopped (None while it goes on)
        self.failed_at: float | None = None  # wall clock, epoch s
        self.frames_not_recorded = 0
        self.reads_not_recorded = 0

    def _no_sensor(self, name: str) -> None:
        known = ", ".join(s.name for s in self.rig.sensors) or "none"
        raise UsageError(f"rig {self.rig.name!r} has no serial sensor {name!r} (has: {known})")

    def write_can(self, frames: FrameBatch | list[can.Message]) -> None:
        """Append CAN frames (a batch from a source, or python-can messages)."""
        if self.failure is not None:
            self.frames_not_recorded += len(frames)
            return
        msgs = frames.to_messages() if isinstance(frames, FrameBatch) else frames
        try:
            for msg in msgs:
                self._can.on_message_received(msg)
        except OSError as exc:
            self._fail(exc)
            self.frames_not_recorded += len(msgs)
            return
        self.frames += len(msgs)
        self.maybe_flush()

    def write_serial(self, sensor: str, records: list[tuple[float, bytes]]) -> None:
        """Append serial reads ``(host_time, bytes)`` of one sensor (zero length = link break)."""
        w = self._serial.get(sensor)
        if w is None:
            self._no_sensor(sensor)
        assert w is not None
        if self.failure is not None:
            self.reads_not_recorded += len(records)
            return
        try:
            for t, data in records:
                w.write(t, data)
        except OSError as exc:
            self._fail(exc)
            self.reads_not_recorded += len(records)
            return
        self.serial_records[sensor] += len(records)
        self.maybe_flush()

    def maybe_flush(self) -> None:
        """Flush if the last flush is :data:`FLUSH_EVERY_S` old (call it while idle, too)."""
        if self._closed or self.failure is not None:
            return
        if time.monotonic() - self._last_flush >= FLUSH_EVERY_S:
            self.flush()

    def flush(self) -> None:
        """Push everything written so far to the disk (a failure stops the recording)."""
        if self.failure is not None:
            return
        try:
            f = getattr(self._can, "file", None)
            if f is not None and not f.closed:
                f.flush()
                _fsync(f)
            for w in self._serial.values():
                w.flush()
                _fsync(getattr(w, "_f", None))
        except OSError as exc:
            self._fail(exc)
        self._last_flush = time.monotonic()

    def _fail(self, exc: OSError) -> None:
        self.failure = f"{self.out_dir}: {exc.strerror or exc}"
        self.failed_at = time.time()

    def state_line(self) -> str | None:
        """One line for the screen once the recording stopped (None while it goes on)."""
        if self.failure is None:
            return None
        return (f"RECORDING STOPPED ({self.failure}): {self.frames_not_recorded} CAN frames "
                f"and {self.reads_not_recorded} serial reads not recorded; analysis goes on")

    def fault_lines(self) -> list[str]:
        if self.failure is None:
            return []
        when = time.strftime("%H:%M:%S", time.gmtime(self.failed_at or 0))
        return [f"the recording stopped at {when} UTC ({self.failure}): {self.frames} CAN "
                f"frames are in {self.can_path.name}, {self.frames_not_recorded} later ones "
                "were analysed but not recorded"]

    def close(self) -> None:
        """Flush and close every file. Safe to call twice."""
        if getattr(self, "_closed", True):
            return
        self._closed = True
        try:
            self._can.stop()
        except OSError as exc:  # the last flush of a full disk
            if self.failure is None:
                self._fail(exc)
        finally:
            for w in self._serial.values():
                try:
                    w.close()
                except OSError as exc:
                    if self.failure is None:
                        self._fail(exc)

    def __enter__(self) -> Recorder:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()


def _fsync(f: object) -> None:
    try:
        os.fsync(f.fileno())  # type: ignore[union-attr]
    except (AttributeError, OSError, ValueError):
        pass  # not a real file (a pipe, a buffer): nothing to sync
