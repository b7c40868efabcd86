"""Frame encoding against an independent reference: Python's struct module and binascii."""

from __future__ import annotations

import binascii
import struct

import numpy as np
import pytest
from test_serial_sensors import ODD, XOR, Larch

from crankbeat.errors import InputError, RigError
from crankbeat.logger.rig.model import Checksum, SerialField
from crankbeat.logger.serial.frames import FrameLayout, encode_frames


def test_m1_frame_bytes_match_struct_layout():
    # docs/rig table: sync A5 5A | seq u16 LE | time u32 LE | ax ay az i16 LE | CRC over 2..13 LE.
    seq = np.array([0, 1, 65535, 65536 + 7])
    t = np.array([0, 500, 2**32 - 1, 2**32 + 12])
    acc = np.array([[0, 0, 2048], [-1, 2, -2048], [32767, -32768, 5], [1, 2, 3]])
    data = encode_frames(Larch, seq, t, acc)
    assert len(data) == 4 * 16
    for i in range(4):
        body = struct.pack("<HIhhh", seq[i] % 65536, t[i] % 2**32, *acc[i])
        want = b"\xa5\x5a" + body + struct.pack("<H", binascii.crc_hqx(body, 0xFFFF))
        assert data[16 * i : 16 * i + 16] == want


def test_odd_board_big_endian_sum8():
    t = np.array([123456, 7])
    acc = np.array([[-1000, 0, 1000], [1, -2, 3]])
    data = encode_frames(ODD, None, t, acc)
    assert len(data) == 28
    for i in range(2):
        body = struct.pack(">Ihhh", t[i], *acc[i])
        want = b"\x7e\x81\x55" + body + bytes([sum(body) % 256])
        assert data[14 * i : 14 * i + 14] == want


def test_xor_board_checksum_before_fields():
    data = encode_frames(XOR, np.array([300]), np.array([70000]), np.array([[256, -256, 0]]))
    covered = data[2:12]
    x = 0
    for b in covered:
        x ^= b
    assert data[0] == 0xC3 and data[1] == x
    assert data[2] == 300 % 256 and struct.unpack("<H", data[3:5])[0] == 70000 % 65536


def test_layout_decodes_what_it_encodes():
    layout = FrameLayout(Larch)
    acc = np.array([[1, -2, 2048], [-2048, 4096, 0]])
    frames = np.frombuffer(encode_frames(Larch, np.array([5, 6]), np.array([10, 20]), acc),
                           dtype=np.uint8).reshape(2, 16)
    assert layout.checksum_ok(frames).all()
    np.testing.assert_array_equal(layout.accel_g(frames), acc / 2048.0)
    bad = frames.copy()
    bad[1, 9] ^= 0x10
    assert layout.checksum_ok(bad).tolist() == [True, False]


def test_bad_rig_layouts_are_rig_errors():
    from dataclasses import replace
    with pytest.raises(RigError, match="outside"):
        FrameLayout(replace(Larch, frame_length=12))
    with pytest.raises(RigError, match="inside its own range"):
        FrameLayout(replace(Larch, checksum=Checksum("crc16-ccitt-false", start=2, end=16, at=14)))
    no_z = tuple(f for f in Larch.fields if f.role != "accel_z")
    with pytest.raises(RigError, match="accel_z"):
        FrameLayout(replace(Larch, fields=no_z))
    overlap_sync = Larch.fields + (SerialField("x", 1, "u8"),)
    with pytest.raises(RigError, match="after the sync"):
        FrameLayout(replace(Larch, fields=overlap_sync))


def test_encode_rejects_out_of_range_counts():
    with pytest.raises(InputError, match="do not fit i16"):
        encode_frames(Larch, np.array([0]), np.array([0]), np.array([[40000, 0, 0]]))
    with pytest.raises(InputError, match=r"\(n, 3\)"):
        encode_frames(Larch, np.array([0]), np.array([0]), np.array([1, 2, 3]))
