"""The small interface every CAN source implements, and the batch of frames it yields.

A source turns one origin of frames (a log file of some format, a live python-can bus) into
:class:`FrameBatch` objects: plain numpy columns, so that decoding never touches per-frame
Python objects. Problems inside a recording (a corrupt line, a cut) are counted in
:attr:`CanSource.bad_records` and described in :attr:`CanSource.notes`, one line each; only a
source that cannot be opened at all raises (:class:`dsp.errors.SourceError` or its
:class:`~dsp.errors.FormatError`).
"""

from __future__ import annotations

import abc
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from typing import Literal

import can
import numpy as np

#: How many notes of one source are kept; further problems are only counted.
MAX_NOTES = 20

IndexKind = Literal["line", "frame"]


@dataclass
class FrameBatch:
    """Consecutive CAN frames as columns.

    Attributes
    ----------
    ts : (m,) float64
        Receive time, s (the log's or the bus's clock).
    can_id : (m,) uint32
        Arbitration id (0 for error frames, as python-can gives them).
    extended : (m,) bool
        29-bit id.
    dlc : (m,) uint8
        Number of data bytes (python-can's ``dlc``: for CAN FD the byte count, not the code).
    data : (m, 8) or (m, 64) uint8
        Payload, zero-padded beyond ``dlc``; 64 wide when the batch holds a CAN FD frame.
    is_error, is_remote, is_fd : (m,) bool
        Frame kind flags.
    index : (m,) int64
        Where each frame sits in its origin: 1-based line number for text logs, 0-based frame
        ordinal for binary logs and buses (see ``index_kind``).
    origin : str
        File path or bus description, for messages.
    index_kind : {"line", "frame"}
    """

    ts: np.ndarray
    can_id: np.ndarray
    extended: np.ndarray
    dlc: np.ndarray
    data: np.ndarray
    is_error: np.ndarray
    is_remote: np.ndarray
    is_fd: np.ndarray
    index: np.ndarray
    origin: str = ""
    index_kind: IndexKind = "frame"

    def __len__(self) -> int:
        return len(self.ts)

    def where(self, i: int) -> str:
        """``"<origin> line N"`` / ``"<origin> frame N"`` for frame ``i`` of the batch."""
        return f"{self.origin} {self.index_kind} {int(self.index[i])}"

    @classmethod
    def empty(cls, origin: str = "", index_kind: IndexKind = "frame") -> FrameBatch:
        z = np.zeros(0, dtype=bool)
        return cls(
            ts=np.zeros(0), can_id=np.zeros(0, np.uint32), extended=z, dlc=np.zeros(0, np.uint8),
            data=np.zeros((0, 8), np.uint8), is_error=z, is_remote=z, is_fd=z,
            index=np.zeros(0, np.int64), origin=origin, index_kind=index_kind,
        )

    @classmethod
    def from_messages(
        cls,
        msgs: list[can.Message],
        index: Iterable[int],
        *,
        origin: str = "",
        index_kind: IndexKind = "frame",
    ) -> FrameBatch:
        """Columns from python-can messages (one Python pass; the slow path's converter)."""
        m = len(msgs)
        if m == 0:
            return cls.empty(origin, index_kind)
        width = 64 if any(len(msg.data) > 8 for msg in msgs) else 8
        raw = bytearray(m * width)
        for i, msg in enumerate(msgs):
            d = msg.data
            if d:
                raw[i * width : i * width + len(d)] = d
        return cls(
            ts=np.fromiter((msg.timestamp for msg in msgs), np.float64, m),
            can_id=np.fromiter((msg.arbitration_id for msg in msgs), np.uint32, m),
            extended=np.fromiter((msg.is_extended_id for msg in msgs), bool, m),
            dlc=np.fromiter((msg.dlc for msg in msgs), np.uint8, m),
            data=np.frombuffer(bytes(raw), np.uint8).reshape(m, width).copy(),
            is_error=np.fromiter((msg.is_error_frame for msg in msgs), bool, m),
            is_remote=np.fromiter((msg.is_remote_frame for msg in msgs), bool, m),
            is_fd=np.fromiter((msg.is_fd for msg in msgs), bool, m),
            index=np.fromiter(index, np.int64, m),
            origin=origin,
            index_kind=index_kind,
        )

    def to_messages(self) -> list[can.Message]:
        """python-can messages of the batch (for writers: recording, tests)."""
        out = []
        for i in range(len(self)):
            n = int(self.dlc[i])
            remote = bool(self.is_remote[i])
            out.append(
                can.Message(
                    timestamp=float(self.ts[i]),
                    arbitration_id=int(self.can_id[i]),
                    is_extended_id=bool(self.extended[i]),
                    is_remote_frame=remote,
                    is_error_frame=bool(self.is_error[i]),
                    is_fd=bool(self.is_fd[i]),
                    dlc=n,
                    data=None if remote else bytes(self.data[i, :n]),
                )
            )
        return out


def concat(batches: list[FrameBatch]) -> FrameBatch:
    """One batch from several (widths unified to the widest)."""
    if not batches:
        return FrameBatch.empty()
    if len(batches) == 1:
        return batches[0]
    width = max(b.data.shape[1] for b in batches)
    data = [
        b.data if b.data.shape[1] == width
        else np.pad(b.data, ((0, 0), (0, width - b.data.shape[1])))
        for b in batches
    ]
    cols = {
        k: np.concatenate([getattr(b, k) for b in batches])
        for k in ("ts", "can_id", "extended", "dlc", "is_error", "is_remote", "is_fd", "index")
    }
    return FrameBatch(data=np.concatenate(data), origin=batches[0].origin,
                      index_kind=batches[0].index_kind, **cols)


class CanSource(abc.ABC):
    """A source of CAN frames: a log file or a live bus.

    Use as a context manager, or call :meth:`close`. ``bad_records`` counts lines or frames that
    could not be read (skipped); ``notes`` holds the first :data:`MAX_NOTES` one-line messages.
    ``progress()`` says how far a recording has been read (bytes done, bytes total).
    """

    origin: str = ""

    def __init__(self) -> None:
        self.bad_records = 0
        self.notes: list[str] = []

    def note(self, text: str) -> None:
        if len(self.notes) < MAX_NOTES:
            self.notes.append(text)

    @abc.abstractmethod
    def batches(self, max_frames: int = 65536) -> Iterator[FrameBatch]:
        """Yield the frames in arrival order, at most ``max_frames`` per batch."""

    def progress(self) -> tuple[float, float | None]:
        """(done, total) in bytes for files; total is None for live sources."""
        return 0.0, None

    def close(self) -> None:  # noqa: B027 - sources without resources need nothing
        """Release the file or bus."""

    def __enter__(self) -> CanSource:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()
