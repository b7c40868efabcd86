"""The byte layout of one sensor's frames, compiled from its rig description.

:class:`FrameLayout` checks a :class:`~logger.rig.model.SerialSensor` once (every field and the
checksum inside the frame, the sync at offset 0) and then decodes or encodes many frames at a
time as ``(n, frame_length)`` uint8 arrays. :func:`encode_frames` is what the simulator and the
tests use to make byte streams; the parser uses :meth:`FrameLayout.decode` and
:meth:`FrameLayout.checksum_ok`.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from crankbeat.errors import InputError, RigError
from crankbeat.logger.rig.model import SerialField, SerialSensor
from crankbeat.logger.serial.checksums import CHECKSUM_FUNCTIONS

_ACCEL_ROLES = ("accel_x", "accel_y", "accel_z")


def _np_dtype(f: SerialField) -> np.dtype:
    order = "<" if f.byte_order == "little" else ">"
    return np.dtype(f"{order}{f.dtype[0]}{f.size}")


@dataclass(frozen=True)
class FrameLayout:
    """A sensor's frame layout, checked and ready for vectorised decoding.

    The sync bytes sit at offset 0 of every frame (the rig model's convention).
    """

    sensor: SerialSensor

    def __post_init__(self) -> None:
        s = self.sensor
        where = f"serial sensor {s.name!r}"
        length = s.frame_length
        if length < 1:
            raise RigError(f"{where}: frame_length must be >= 1, got {length}")
        if len(s.sync) > length:
            raise RigError(f"{where}: sync {s.sync!r} is longer than the frame ({length} B)")
        for f in s.fields:
            if f.offset < len(s.sync) or f.offset + f.size > length:
                raise RigError(
                    f"{where}: field {f.name!r} at offset {f.offset} ({f.size} B) is outside "
                    f"bytes {len(s.sync)}..{length - 1} after the sync"
                )
        for role in _ACCEL_ROLES:
            if s.field_for(role) is None:
                raise RigError(f"{where}: no field has role {role!r}")
        c = s.checksum
        if c.kind != "none":
            if not (0 <= c.start < c.end <= length):
                raise RigError(
                    f"{where}: checksum range {c.start}..{c.end} is outside the {length}-byte frame"
                )
            if not (0 <= c.at and c.at + c.size <= length):
                raise RigError(f"{where}: checksum at offset {c.at} does not fit in the frame")
            if c.start < c.at + c.size and c.at < c.end:
                raise RigError(f"{where}: checksum at offset {c.at} lies inside its own range")
        elif not s.sync:
            raise RigError(f"{where}: a frame with neither sync bytes nor checksum cannot be found")

    @property
    def length(self) -> int:
        return self.sensor.frame_length

    # -- decoding -------------------------------------------------------------------------
    def field_raw(self, frames: np.ndarray, f: SerialField) -> np.ndarray:
        """Raw values of field ``f`` in each row of ``frames`` ((n, L) uint8): (n,) int64."""
        cols = np.ascontiguousarray(frames[:, f.offset : f.offset + f.size])
        return cols.view(_np_dtype(f)).reshape(-1).astype(np.int64)

    def stored_checksum(self, frames: np.ndarray) -> np.ndarray:
        c = self.sensor.checksum
        cols = np.ascontiguousarray(frames[:, c.at : c.at + c.size])
        order = "<" if c.byte_order == "little" else ">"
        return cols.view(np.dtype(f"{order}u{c.size}")).reshape(-1)

    def computed_checksum(self, frames: np.ndarray) -> np.ndarray:
        c = self.sensor.checksum
        return CHECKSUM_FUNCTIONS[c.kind](np.ascontiguousarray(frames[:, c.start : c.end]))

    def checksum_ok(self, frames: np.ndarray) -> np.ndarray:
        """(n,) bool: the stored checksum matches the computed one (all True for kind "none")."""
        if self.sensor.checksum.kind == "none":
            return np.ones(frames.shape[0], dtype=bool)
        return self.stored_checksum(frames) == self.computed_checksum(frames)

    def accel_g(self, frames: np.ndarray) -> np.ndarray:
        """(n, 3) float64 acceleration in g, sensor axes x, y, z."""
        out = np.empty((frames.shape[0], 3), dtype=np.float64)
        for k, role in enumerate(_ACCEL_ROLES):
            f = self.sensor.field_for(role)
            assert f is not None  # checked in __post_init__
            out[:, k] = self.field_raw(frames, f) * f.scale
        return out

    # -- encoding -------------------------------------------------------------------------
    def encode(self, values: dict[str, np.ndarray], n: int) -> np.ndarray:
        """Frames (n, L) uint8 with the sync, the given raw field values (by field name), zeros
        elsewhere, and a valid checksum."""
        s = self.sensor
        frames = np.zeros((n, self.length), dtype=np.uint8)
        frames[:, : len(s.sync)] = np.frombuffer(s.sync, dtype=np.uint8)
        for f in s.fields:
            if f.name not in values:
                continue
            raw = np.asarray(values[f.name], dtype=np.int64).reshape(-1)
            if raw.shape[0] != n:
                raise InputError(f"field {f.name!r}: expected {n} values, got {raw.shape[0]}")
            dt = _np_dtype(f)
            info = np.iinfo(dt)
            wrapped = raw % (1 << (8 * f.size)) if dt.kind == "u" else raw
            if wrapped.min(initial=0) < info.min or wrapped.max(initial=0) > info.max:
                raise InputError(
                    f"field {f.name!r}: values {wrapped.min()}..{wrapped.max()} "
                    f"do not fit {f.dtype}"
                )
            frames[:, f.offset : f.offset + f.size] = (
                wrapped.astype(dt).view(np.uint8).reshape(n, f.size)
            )
        c = s.checksum
        if c.kind != "none":
            order = "<" if c.byte_order == "little" else ">"
            crc = self.computed_checksum(frames).astype(np.dtype(f"{order}u{c.size}"))
            frames[:, c.at : c.at + c.size] = crc.view(np.uint8).reshape(n, c.size)
        return frames


def encode_frames(
    sensor: SerialSensor,
    seq: np.ndarray,
    device_time_raw: np.ndarray,
    accel_raw: np.ndarray,
) -> bytes:
    """Serialise samples into the sensor's frames, back to back.

    Parameters
    ----------
    sensor : SerialSensor
        The board's description (sync, fields, checksum).
    seq : (n,) int
        Sequence numbers; reduced modulo the field's width, so unwrapped counts may be given.
        Ignored when the sensor has no ``sequence`` field.
    device_time_raw : (n,) int
        Device clock in its raw unit (µs for the reference rig); reduced modulo the field width.
        Ignored when the sensor has no ``device_time`` field.
    accel_raw : (n, 3) int
        Acceleration counts x, y, z (physical value = counts * field scale).

    Returns
    -------
    bytes
        ``n * sensor.frame_length`` bytes.
    """
    layout = FrameLayout(sensor)
    accel = np.asarray(accel_raw)
    if accel.ndim != 2 or accel.shape[1] != 3:
        raise InputError(f"accel_raw must have shape (n, 3), got {accel.shape}")
    if accel.size and not np.issubdtype(accel.dtype, np.integer):
        raise InputError(f"accel_raw must be integer counts, got dtype {accel.dtype}")
    n = accel.shape[0]
    values: dict[str, np.ndarray] = {}
    for role, data in (("sequence", seq), ("device_time", device_time_raw)):
        f = sensor.field_for(role)
        if f is not None:
            values[f.name] = np.asarray(data, dtype=np.int64).reshape(-1)
    for k, role in enumerate(_ACCEL_ROLES):
        f = sensor.field_for(role)
        assert f is not None
        values[f.name] = accel[:, k].astype(np.int64)
    return layout.encode(values, n).tobytes()
