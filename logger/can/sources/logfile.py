"""CAN log files of any format python-can reads, through its own ``LogReader``.

This is the general (and slower, ~250 k frames/s) path: candump ``.log``, ``.asc``, ``.blf``,
``.csv``, ``.trc``, ``.mf4`` where installed, and their ``.gz`` variants. ``.asc``, ``.blf``,
``.csv`` and ``.trc`` are read record by record and go on after a damaged record (see
:mod:`.resync`); other formats end the reading at the damage with a note, every frame before
it kept. A file python-can cannot even start to read raises :class:`~dsp.errors.FormatError`.
"""

from __future__ import annotations

import gzip
import os
import pathlib
from collections.abc import Iterator

import can
from can.io import MESSAGE_READERS
from can.io.generic import TextIOMessageReader

from crankbeat.errors import FormatError, SourceError
from crankbeat.logger.can.sources.base import CanSource, FrameBatch
from crankbeat.logger.can.sources.resync import ResyncBLFReader, read_text


def _one_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return f"{type(exc).__name__}: {text[0]}" if text else type(exc).__name__


def _open_gzip(path: str, real_suffix: str, kwargs: dict) -> can.io.generic.MessageReader:
    """python-can's LogReader drops reader options for ``.gz`` files; open those here."""
    try:
        cls = MESSAGE_READERS[real_suffix]
    except KeyError:
        raise ValueError(f"no python-can reader for {real_suffix!r} inside gzip") from None
    mode = "rt" if issubclass(cls, TextIOMessageReader) else "rb"
    f = gzip.open(path, mode=mode)  # noqa: SIM115 - the reader closes it in stop()
    try:
        return cls(f, **kwargs)
    except BaseException:
        f.close()
        raise


#: Formats read record by record with resynchronisation (see :mod:`.resync`).
TEXT_FORMATS = (".asc", ".csv", ".trc", ".log")


class LogFileSource(CanSource):
    """Frames of a CAN log read by python-can's own readers.

    Parameters
    ----------
    path : str or os.PathLike
        The log; the format comes from the suffix (``.gz`` adds gzip).

    Notes
    -----
    ``.asc``, ``.csv``, ``.trc`` and ``.blf`` are read record by record: a damaged line or
    object is counted, noted and skipped, and the reading goes on (:mod:`.resync`); so is a
    frame with fewer data bytes than its DLC (python-can pads those with nothing: a damaged
    record). ``FrameBatch.index`` is the line number for text formats, the frame ordinal
    otherwise. ``.asc`` is read with ``relative_timestamp=False`` so that its times stay on
    the recording's clock (python-can would otherwise start them at 0).
    """

    def __init__(self, path: str | os.PathLike) -> None:
        super().__init__()
        self.path = os.fspath(path)
        self.origin = self.path
        try:
            self.size = os.path.getsize(self.path)
        except OSError as exc:
            raise SourceError(f"{self.path}: cannot open CAN log: {exc.strerror}") from None
        suffixes = [s.lower() for s in pathlib.PurePath(self.path).suffixes]
        self._gz = bool(suffixes) and suffixes[-1] == ".gz"
        real = suffixes[-2] if self._gz and len(suffixes) > 1 else (
            suffixes[-1] if suffixes else "")
        self._real = real
        self._kwargs = {"relative_timestamp": False} if real == ".asc" else {}
        self._file = None
        self._first_bad = ""
        try:
            self._reader = self._open(real)
        except (ValueError, OSError, EOFError, ImportError) as exc:
            raise FormatError(f"{self.path}: offset 0: not a readable CAN log "
                              f"({_one_line(exc)})") from None
        except Exception as exc:  # noqa: BLE001 - python-can's readers raise anything on junk
            raise FormatError(f"{self.path}: offset 0: not a readable CAN log "
                              f"({_one_line(exc)})") from None
        self.frames_read = 0
        self._done = False

    def _open(self, real: str):
        if real in TEXT_FORMATS and real in MESSAGE_READERS:
            opener = gzip.open if self._gz else open
            self._file = opener(self.path, "rt", encoding="utf-8", errors="replace")
            return None
        if real == ".blf":
            self._file = (gzip.open if self._gz else open)(self.path, "rb")
            try:
                return ResyncBLFReader(self._file, self._bad)
            except BaseException:
                self._file.close()
                raise
        if self._gz:
            return _open_gzip(self.path, real, self._kwargs)
        return can.LogReader(self.path, **self._kwargs)

    def _bad(self, where: str, why: str, lost: str) -> None:
        if not self.bad_records:
            self._first_bad = where
        self.bad_records += 1
        self.note(f"{self.path} {where}: {why}; {lost}")

    def _position(self) -> float:
        f = self._file if self._file is not None else getattr(self._reader, "file", None)
        for obj in (getattr(f, "fileobj", None), getattr(f, "buffer", None), f):
            try:
                return float(obj.tell())  # type: ignore[union-attr]
            except (AttributeError, OSError, ValueError):
                continue
        return 0.0

    def progress(self) -> tuple[float, float | None]:
        if self._done:
            return float(self.size), float(self.size)
        return min(self._position(), float(self.size)), float(self.size)

    def _messages(self) -> Iterator[tuple[can.Message, int]]:
        """(frame, index) in file order; damage inside is reported through :meth:`_bad`."""
        if self._reader is None:
            cls = MESSAGE_READERS[self._real]
            yield from read_text(cls, self._file, self._bad, self._kwargs)
            return
        for k, msg in enumerate(self._reader):
            yield msg, k

    def _usable(self, msg: can.Message, index: int) -> bool:
        n = len(msg.data)
        kind = "line" if self._reader is None else "frame"
        id_bits, dlc_max = (32, 255) if msg.is_error_frame else (29, 64)  # error frames: any
        if not (0 <= msg.arbitration_id < 1 << id_bits and 0 <= msg.dlc <= dlc_max and n <= 64):
            self._bad(f"{kind} {index}", f"id {msg.arbitration_id} or DLC {msg.dlc} out of "
                      "range (29-bit id, DLC 0..64 expected)", "frame skipped")
            return False
        if msg.is_error_frame or msg.is_remote_frame:
            return True
        # classic CAN: DLC codes 9..15 mean 8 bytes; CAN FD: python-can's dlc is the byte count
        need = msg.dlc if msg.is_fd else min(msg.dlc, 8)
        if n < need or n > 64:
            self._bad(f"{kind} {index}", f"id 0x{msg.arbitration_id:X} has {n} data bytes for "
                      f"DLC {msg.dlc}", "frame skipped")
            return False
        return True

    def batches(self, max_frames: int = 65536) -> Iterator[FrameBatch]:
        kind = "line" if self._reader is None else "frame"
        it = self._messages()
        while True:
            msgs: list[can.Message] = []
            index: list[int] = []
            failed: BaseException | None = None
            try:
                for msg, k in it:
                    if not self._usable(msg, k):
                        continue
                    msgs.append(msg)
                    index.append(k)
                    if len(msgs) >= max_frames:
                        break
            except Exception as exc:  # noqa: BLE001 - python-can raises anything on junk
                failed = exc
            self.frames_read += len(msgs)
            if failed is not None:
                self.bad_records += 1
                if self.frames_read == 0:
                    raise FormatError(f"{self.path}: frame 0: not a readable CAN log "
                                      f"({_one_line(failed)})") from None
                self.note(f"{self.path} frame {self.frames_read}: unreadable "
                          f"({_one_line(failed)}); the {self.frames_read} frames before it "
                          "were kept, reading stops here")
            if msgs:
                yield FrameBatch.from_messages(msgs, index, origin=self.path, index_kind=kind)
            if failed is not None or len(msgs) < max_frames:
                self._done = True
                self._check_count()
                if self.frames_read == 0 and self.bad_records:  # junk, not a damaged log
                    raise FormatError(f"{self.path}: frame 0: not a readable CAN log (no frame "
                                      f"read, {self.bad_records} unreadable line(s) or "
                                      f"record(s), the first at {self._first_bad})")
                return

    def _check_count(self) -> None:
        """Binary logs whose header counts the objects (BLF): say when the file was cut."""
        claimed = getattr(self._reader, "file_size", None)
        objects = getattr(self._reader, "object_count", None)
        if not isinstance(claimed, int) or not isinstance(objects, int) or claimed <= 0:
            return
        if self.size < claimed and not self._gz:
            self.bad_records += 1
            self.note(f"{self.path} offset {self.size}: file ends before the {claimed} bytes "
                      f"its header gives (cut short?); the {self.frames_read} frames before "
                      "the cut were kept")

    def close(self) -> None:
        stop = getattr(self._reader, "stop", None)
        if stop is not None:
            stop()
        if self._file is not None:
            self._file.close()
