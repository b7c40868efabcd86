"""Decode only: the recordings through ``logger.stream.replay`` with no analysis after it.

That is every step a replay takes before the dsp stages: reading the CAN log (the numpy
candump path for ``.log``), decoding the rig's frames, reading the capture files, parsing the
serial frames and aligning the board's clock onto the CAN time base.
"""

from __future__ import annotations

import os
from dataclasses import dataclass

from bench.floors import best_of


@dataclass
class DecodeCount:
    """What one decode pass delivered."""

    chunks: int
    can_frames: int  # every frame the CAN source read (StreamHealth.can_frames)
    tooth_frames: int
    status_frames: int
    samples: int  # accelerometer samples, all sensors


def _decode_once(stream, rig, can_path: str, accel: dict[str, str], chunk_s: float | None
                 ) -> DecodeCount:
    count = DecodeCount(0, 0, 0, 0, 0)
    options = {} if chunk_s is None else {"chunk_s": chunk_s}
    with stream.replay(rig, can_path, accel, **options) as chunks:
        for chunk in chunks:
            count.chunks += 1
            count.tooth_frames += len(chunk.teeth)
            count.status_frames += len(chunk.status)
            count.samples += sum(len(b) for b in chunk.accel.values())
            count.can_frames = chunk.health.can_frames
    return count


def decode(rig, can_path: str | os.PathLike, accel: dict[str, str | os.PathLike] | None = None,
           *, repeat: int = 1, chunk_s: float | None = None
           ) -> tuple[float, float, DecodeCount]:
    """Best wall and CPU times (s) of ``repeat`` decode passes, and what a pass delivered.

    ``chunk_s`` None keeps the stream's default chunk length (what a replay uses).
    """
    from crankbeat.logger import stream  # imported before the clock starts: a replay has it loaded

    acc = {k: os.fspath(v) for k, v in (accel or {}).items()}
    return best_of(lambda: _decode_once(stream, rig, os.fspath(can_path), acc, chunk_s),
                   repeat=repeat)
