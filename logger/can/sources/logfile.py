"""CAN log files of any format python-can reads, through its own ``LogReader``.

This is the general (and slower, ~250 k frames/s) path: candump ``.log``, ``.asc``, ``.blf``,
``.csv``, ``.trc``, ``.mf4`` where installed, and their ``.gz`` variants. python-can cannot
resume after a damaged record, so damage ends the reading with a note; every frame before it is
kept. A file python-can cannot even start to read raises :class:`~dsp.errors.FormatError`.
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


class LogFileSource(CanSource):
    """Frames of a CAN log read by python-can's ``LogReader``.

    Parameters
    ----------
    path : str or os.PathLike
        The log; the format comes from the suffix (``.gz`` adds gzip).

    Notes
    -----
    ``.asc`` is opened with ``relative_timestamp=False`` so that its times stay on the
    recording's clock (python-can would otherwise start them at 0). ``FrameBatch.index`` is the
    frame ordinal (python-can does not expose line numbers).
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
        real = suffixes[-2] if suffixes and suffixes[-1] == ".gz" and len(suffixes) > 1 else (
            suffixes[-1] if suffixes else "")
        kwargs = {"relative_timestamp": False} if real == ".asc" else {}
        try:
            if suffixes and suffixes[-1] == ".gz":
                self._reader = _open_gzip(self.path, real, kwargs)
            else:
                self._reader = can.LogReader(self.path, **kwargs)
        except (ValueError, OSError, EOFError, ImportError) as exc:
            raise FormatError(f"{self.path}: offset 0: not a readable CAN log "
                              f"({_one_line(exc)})") from None
        except Exception as exc:  # noqa: BLE001 - python-can's readers raise anything on junk
            raise FormatError(f"{self.path}: offset 0: not a readable CAN log "
                              f"({_one_line(exc)})") from None
        self.frames_read = 0
        self._done = False

    def _position(self) -> float:
        f = getattr(self._reader, "file", None)
        for obj in (getattr(f, "buffer", None), f):
            try:
                return float(obj.tell())  # type: ignore[union-attr]
            except (AttributeError, OSError, ValueError):
                continue
        return 0.0

    def progress(self) -> tuple[float, float | None]:
        if self._done:
            return float(self.size), float(self.size)
        return min(self._position(), float(self.size)), float(self.size)

    def batches(self, max_frames: int = 65536) -> Iterator[FrameBatch]:
        it = iter(self._reader)
        while True:
            msgs: list[can.Message] = []
            failed: BaseException | None = None
            try:
                for msg in it:
                    msgs.append(msg)
                    if len(msgs) >= max_frames:
                        break
            except Exception as exc:  # noqa: BLE001 - python-can raises anything on junk
                failed = exc
            first = self.frames_read
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
                yield FrameBatch.from_messages(msgs, range(first, first + len(msgs)),
                                               origin=self.path, index_kind="frame")
            if failed is not None or len(msgs) < max_frames:
                self._done = True
                self._check_count()
                return

    def _check_count(self) -> None:
        """Binary logs whose header counts the objects (BLF): say when the file was cut."""
        claimed = getattr(self._reader, "file_size", None)
        objects = getattr(self._reader, "object_count", None)
        if not isinstance(claimed, int) or not isinstance(objects, int) or claimed <= 0:
            return
        if self.size < claimed:
            self.bad_records += 1
            self.note(f"{self.path} offset {self.size}: file ends before the {claimed} bytes "
                      f"its header gives (cut short?); the {self.frames_read} frames before "
                      "the cut were kept")

    def close(self) -> None:
        stop = getattr(self._reader, "stop", None)
        if stop is not None:
            stop()
