"""What every source (live or recorded) yields: decoded, time-aligned chunks.

Live buses, log files and capture files all end up as a stream of :class:`Chunk`; the analysis
never knows which. Arrays are numpy, times in seconds on the CAN log's time base.
"""

from __future__ import annotations

from dataclasses import dataclass, field, fields

import numpy as np


@dataclass
class TeethBlock:
    """Decoded crank-tooth frames, in arrival order.

    Attributes
    ----------
    frame_time : (m,) float64
        CAN receive time of each tooth frame, s.
    periods : (m, k) float64
        The k tooth periods each frame carries, oldest first, s. NaN where the raw value was
        saturated (engine stopped or cranking).
    cam : (m,) int8
        Cam level at the last tooth of the frame (-1 when the rig has no cam signal).
    lost_before : (m,) int32
        Frames missing just before this one, from the rolling counter (0 = none).
    frame_index : (m,) int64
        Index of the frame in the source (counting every frame of every id), for messages.
    """

    frame_time: np.ndarray
    periods: np.ndarray
    cam: np.ndarray
    lost_before: np.ndarray
    frame_index: np.ndarray

    def __len__(self) -> int:
        return len(self.frame_time)


@dataclass
class StatusBlock:
    """Decoded ECU status frames: one array per role present in the rig (others absent)."""

    t: np.ndarray
    values: dict[str, np.ndarray]  # role -> (m,) float64, e.g. "engine_speed", "throttle"

    def __len__(self) -> int:
        return len(self.t)


@dataclass
class AccelBlock:
    """Accelerometer samples of one sensor, aligned onto the CAN time base.

    ``gap_before[i]`` is True where samples were lost (sequence gap, reconnect) just before i.
    ``xyz`` is in g, sensor axes (the rig says how they sit on the bike).
    """

    sensor: str
    t: np.ndarray  # (n,) float64 s
    xyz: np.ndarray  # (n, 3) float64 g
    gap_before: np.ndarray  # (n,) bool

    def __len__(self) -> int:
        return len(self.t)


@dataclass
class StreamHealth:
    """Running counters of what the sources saw (cumulative since the start of the run)."""

    can_frames: int = 0
    can_unknown_id: int = 0
    can_error_frames: int = 0
    can_remote_frames: int = 0
    can_lost_frames: int = 0
    can_bad_length: int = 0
    can_time_backwards: int = 0
    can_time_jumps: int = 0
    can_duplicates: int = 0  # repeated frames (same rolling counter / same bytes at once)
    can_out_of_order: int = 0  # frames stamped off the time line (early, late), skipped
    can_time_steps: int = 0  # clock steps (back: later times shifted; ahead: a pause)
    # [from s on the run's time line, shift s] per step back (logger/can/guard.py: log_stamps)
    can_clock_shifts: list = field(default_factory=list)
    can_bad_time: int = 0  # receive times that are not finite numbers, skipped
    can_bad_values: int = 0  # frames whose values cannot be (tooth period <= 0), skipped
    can_bad_records: int = 0  # lines/records of the recording that could not be read
    serial_good: dict[str, int] = field(default_factory=dict)
    serial_corrupt: dict[str, int] = field(default_factory=dict)
    serial_lost: dict[str, int] = field(default_factory=dict)
    serial_reconnects: dict[str, int] = field(default_factory=dict)
    serial_bad_records: dict[str, int] = field(default_factory=dict)  # capture records skipped
    serial_bytes_lost: dict[str, int] = field(default_factory=dict)  # bytes skipped resyncing
    serial_time_steps: dict[str, int] = field(default_factory=dict)  # host clock steps
    notes: list[str] = field(default_factory=list)  # one-line messages (first few of each kind)

    def as_dict(self) -> dict:
        """Every counter (not the notes), as plain ints and dicts of ints, for storing."""
        return {f.name: (dict(v) if isinstance(v := getattr(self, f.name), dict) else v)
                for f in fields(self) if f.name != "notes"}


@dataclass
class Chunk:
    """One step of the stream: whatever arrived since the previous chunk."""

    teeth: TeethBlock
    status: StatusBlock
    accel: dict[str, AccelBlock]
    health: StreamHealth
    end_time: float  # s, CAN time base: everything before this has been delivered
