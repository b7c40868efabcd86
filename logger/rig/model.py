"""The checked, in-memory form of a rig file.

A rig file (TOML) describes one instrumented bike completely; :func:`logger.rig.load_rig`
reads and validates it into these frozen dataclasses. Nothing downstream reads TOML.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

from crankbeat.dsp.crank import ToothWheel
from crankbeat.dsp.engine import Engine

ByteOrder = Literal["little", "big"]

#: Roles a CAN signal can feed. Each role is consumed by one stage of the pipeline.
CAN_ROLES = (
    "tooth_periods",  # array signal: N consecutive tooth periods, oldest first, seconds after scale
    "cam_level",  # cam sensor level at the last tooth of the frame (0/1)
    "counter",  # rolling frame counter of its message (frame-loss detection)
    "engine_speed",  # rpm
    "throttle",  # percent
    "gear",  # 0 = neutral
    "coolant",  # degC
    "road_speed",  # km/h
)

#: Roles a serial field can feed.
SERIAL_ROLES = ("sequence", "device_time", "accel_x", "accel_y", "accel_z")

ChecksumKind = Literal["crc16-ccitt-false", "sum8", "xor8", "none"]
Location = Literal["bar", "seat", "footpeg", "tank", "frame", "engine"]


@dataclass(frozen=True)
class CanSignal:
    """One signal in a CAN frame, in the usual CAN (DBC-style) bit conventions.

    ``start_bit`` follows the common convention: for little-endian (Intel) signals it is the
    signal's least significant bit; for big-endian (Motorola) signals it is the most significant
    bit, numbered with bit 0 = LSB of byte 0 and bit 7 = MSB of byte 0 (sawtooth numbering).
    ``count > 1`` makes it an array signal: ``count`` elements of ``length`` bits each, element i
    starting ``i * length`` bits after element 0 (little-endian) or in the next bytes (big-endian).
    ``saturated_raw`` is the raw value that means "at or beyond full scale" (decoded as NaN).
    Physical value = raw * scale + offset.
    """

    name: str
    start_bit: int
    length: int
    byte_order: ByteOrder = "little"
    signed: bool = False
    scale: float = 1.0
    offset: float = 0.0
    unit: str = ""
    count: int = 1
    role: str | None = None
    saturated_raw: int | None = None
    modulo: int | None = None  # for counters: the value after which it wraps to 0


@dataclass(frozen=True)
class CanMessage:
    """A CAN frame layout: arbitration id and its signals."""

    name: str
    can_id: int
    extended: bool
    length: int  # data bytes expected (DLC)
    signals: tuple[CanSignal, ...]
    rate_hz: float | None = None

    def signal_for(self, role: str) -> CanSignal | None:
        for sig in self.signals:
            if sig.role == role:
                return sig
        return None


@dataclass(frozen=True)
class CanBus:
    """Where the live CAN bus is (python-can interface, channel, bitrate)."""

    interface: str = "socketcan"
    channel: str = "can0"
    bitrate: int = 1_000_000
    fd: bool = False


@dataclass(frozen=True)
class SerialField:
    """One field of a fixed-length serial frame (byte offset, type, scale)."""

    name: str
    offset: int
    dtype: Literal["u8", "i8", "u16", "i16", "u32", "i32"]
    byte_order: ByteOrder = "little"
    scale: float = 1.0
    unit: str = ""
    role: str | None = None

    @property
    def size(self) -> int:
        return int(self.dtype[1:]) // 8


@dataclass(frozen=True)
class Checksum:
    """Frame checksum: algorithm, the byte range it covers, and where it is stored."""

    kind: ChecksumKind = "crc16-ccitt-false"
    start: int = 2  # first covered byte
    end: int = 14  # one past the last covered byte
    at: int = 14  # offset of the stored checksum
    byte_order: ByteOrder = "little"

    @property
    def size(self) -> int:
        return {"crc16-ccitt-false": 2, "sum8": 1, "xor8": 1, "none": 0}[self.kind]


@dataclass(frozen=True)
class SerialSensor:
    """An accelerometer board on a serial port, with its mounting."""

    name: str
    location: Location  # picks the weighting: bar/footpeg -> Wh, seat -> Wk/Wd
    mount: str  # free text label, e.g. "left handlebar clamp"
    axes: tuple[str, str, str]  # where sensor x, y, z point on the bike: "forward", "left", ...
    port: str
    baud: int
    sample_rate_hz: float
    frame_length: int
    sync: bytes
    fields: tuple[SerialField, ...]
    checksum: Checksum
    sequence_modulo: int = 65536
    device_time_modulo: int = 2**32
    device_time_unit_s: float = 1e-6

    def field_for(self, role: str) -> SerialField | None:
        for f in self.fields:
            if f.role == role:
                return f
        return None


@dataclass(frozen=True)
class Limits:
    """Run-time limits and detector overrides from the rig file (all optional)."""

    idle_rpm: float = 1300.0
    rev_limit_rpm: float = 10500.0
    misfire_alert_pct: float = 2.0  # live alert when the 200-rev window rate exceeds this
    interval_tolerance_deg: float = 3.0
    misfire_threshold: float | None = None  # fixed threshold on the normalised metric, if set


@dataclass(frozen=True)
class Rig:
    """A complete instrumented bike."""

    name: str
    description: str
    source: str  # file path or "preset:NAME"
    engine: Engine
    wheel: ToothWheel  # the dsp's own wheel description: one definition for both packages
    can_bus: CanBus
    messages: tuple[CanMessage, ...]
    sensors: tuple[SerialSensor, ...]
    limits: Limits = field(default_factory=Limits)

    def message_for(self, role: str) -> CanMessage | None:
        """The message carrying ``role`` (None when the rig has no such signal)."""
        for msg in self.messages:
            if msg.signal_for(role) is not None:
                return msg
        return None

    def sensor(self, name: str) -> SerialSensor:
        for s in self.sensors:
            if s.name == name:
                return s
        raise KeyError(name)
