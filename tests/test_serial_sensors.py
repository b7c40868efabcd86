"""Sensor descriptions shared by the serial tests, checked against the shipped preset file.

``Larch`` is the reference rig's handlebar board written out by hand; the test below reads
``logger/presets/larch.toml`` with the standard library's TOML parser so that the hand copy
cannot silently differ from the preset. ``ODD`` is a deliberately different board (3-byte
sync, big-endian fields, sum8 checksum, no sequence field, 8-bit-wide fields) to show that
nothing is tied to the reference layout.
"""

from __future__ import annotations

import tomllib
from pathlib import Path

from crankbeat.logger.rig.model import Checksum, SerialField, SerialSensor

_G = 1.0 / 2048.0  # docs/rig.md: 1/2048 g per bit

Larch = SerialSensor(
    name="bar_left",
    location="bar",
    mount="left handlebar clamp",
    axes=("forward", "left", "up"),
    port="/dev/ttyUSB0",
    baud=921600,
    sample_rate_hz=2000.0,
    frame_length=16,
    sync=b"\xa5\x5a",
    fields=(
        SerialField("sequence", 2, "u16", role="sequence"),
        SerialField("device_time", 4, "u32", unit="us", role="device_time"),
        SerialField("ax", 8, "i16", scale=_G, unit="g", role="accel_x"),
        SerialField("ay", 10, "i16", scale=_G, unit="g", role="accel_y"),
        SerialField("az", 12, "i16", scale=_G, unit="g", role="accel_z"),
    ),
    checksum=Checksum("crc16-ccitt-false", start=2, end=14, at=14, byte_order="little"),
)

# An invented second board: sync 0x7E 0x81 0x55, big-endian, device time in 10 µs ticks (u32),
# no sequence field, accel i16 at 1/1000 g, trailing sum8 over bytes 3..12.
ODD = SerialSensor(
    name="seat_rear",
    location="seat",
    mount="seat base",
    axes=("left", "forward", "up"),
    port="loop://",
    baud=115200,
    sample_rate_hz=500.0,
    frame_length=14,
    sync=b"\x7e\x81\x55",
    fields=(
        SerialField("t", 3, "u32", byte_order="big", role="device_time"),
        SerialField("x", 7, "i16", byte_order="big", scale=1e-3, role="accel_x"),
        SerialField("y", 9, "i16", byte_order="big", scale=1e-3, role="accel_y"),
        SerialField("z", 11, "i16", byte_order="big", scale=1e-3, role="accel_z"),
    ),
    checksum=Checksum("sum8", start=3, end=13, at=13),
    device_time_unit_s=1e-5,
)

# A board with a 1-byte sequence and an xor8 checksum stored before the fields.
XOR = SerialSensor(
    name="peg_right",
    location="footpeg",
    mount="right footpeg",
    axes=("forward", "right", "up"),
    port="loop://",
    baud=230400,
    sample_rate_hz=1000.0,
    frame_length=12,
    sync=b"\xc3",
    fields=(
        SerialField("n", 2, "u8", role="sequence"),
        SerialField("t", 3, "u16", role="device_time"),
        SerialField("x", 5, "i16", scale=1 / 256, role="accel_x"),
        SerialField("y", 7, "i16", scale=1 / 256, role="accel_y"),
        SerialField("z", 9, "i16", scale=1 / 256, role="accel_z"),
        SerialField("spare", 11, "u8"),
    ),
    checksum=Checksum("xor8", start=2, end=12, at=1),
    sequence_modulo=256,
    device_time_modulo=65536,
    device_time_unit_s=1e-4,
)


def test_m1_copy_matches_preset_file():
    preset = Path(__file__).resolve().parents[1] / "logger" / "presets" / "larch.toml"
    doc = tomllib.loads(preset.read_text())
    (board,) = doc["serial"]
    assert board["name"] == Larch.name
    assert board["frame_length"] == Larch.frame_length
    assert bytes(board["sync"]) == Larch.sync
    assert board["baud"] == Larch.baud and board["sample_rate_hz"] == Larch.sample_rate_hz
    assert board["sequence_modulo"] == Larch.sequence_modulo
    assert board["device_time_modulo"] == Larch.device_time_modulo
    assert board["device_time_unit_s"] == Larch.device_time_unit_s
    ck = board["checksum"]
    assert (ck["kind"], ck["start"], ck["end"], ck["at"]) == (
        Larch.checksum.kind, Larch.checksum.start, Larch.checksum.end, Larch.checksum.at)
    fields = {(f["name"], f["offset"], f["dtype"], f.get("scale", 1.0), f.get("role"))
              for f in board["field"]}
    assert fields == {(f.name, f.offset, f.dtype, f.scale, f.role) for f in Larch.fields}
