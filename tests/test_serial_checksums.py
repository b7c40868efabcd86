"""Checksums against published check values and Python's own CRC implementation."""

from __future__ import annotations

import binascii

import numpy as np
import pytest
from hypothesis import given
from hypothesis import strategies as st

from crankbeat.errors import InputError
from crankbeat.logger.serial.checksums import crc16_ccitt_false, sum8, xor8


def test_crc16_ccitt_false_check_value():
    # Check value 0x29B1 over b"123456789": docs/rig.md, and the CRC catalogue entry for
    # CRC-16/CCITT-FALSE (a.k.a. CRC-16/IBM-3740), from memory.
    assert crc16_ccitt_false(b"123456789") == 0x29B1


def test_crc16_empty_is_init():
    # A CRC over no bytes is its init value, 0xFFFF for this variant (common practice).
    assert crc16_ccitt_false(b"") == 0xFFFF


@given(st.lists(st.binary(min_size=0, max_size=40), min_size=1, max_size=1).flatmap(
    lambda one: st.lists(st.binary(min_size=len(one[0]), max_size=len(one[0])), min_size=1,
                         max_size=30)))
def test_crc16_matches_binascii_rowwise(rows):
    # binascii.crc_hqx(data, 0xFFFF) is the standard library's CRC-CCITT (poly 0x1021) with the
    # init given: the same parameters as CCITT-FALSE.
    arr = np.frombuffer(b"".join(rows), dtype=np.uint8).reshape(len(rows), len(rows[0]))
    got = crc16_ccitt_false(arr)
    assert got.dtype == np.uint16
    assert got.tolist() == [binascii.crc_hqx(r, 0xFFFF) for r in rows]


@given(st.binary(max_size=64))
def test_sum8_and_xor8_against_plain_python(data):
    # Definitions (common practice): sum8 = byte sum mod 256, xor8 = xor of all bytes.
    x = 0
    for b in data:
        x ^= b
    assert sum8(data) == sum(data) % 256
    assert xor8(data) == x


def test_sum8_xor8_known_values():
    # '1'..'9' are 0x31..0x39: sum 477 -> 477 - 256 = 221; the xor of the nine codes is 0x31
    # (worked by hand).
    assert sum8(b"123456789") == 221
    assert xor8(b"123456789") == 0x31


def test_rejects_wrong_input_shape():
    with pytest.raises(InputError, match="uint8"):
        crc16_ccitt_false(np.zeros(5, dtype=np.uint8))
