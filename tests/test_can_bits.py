"""Bit layouts against cantools (an independent, general-purpose CAN database library)."""

from __future__ import annotations

import cantools.database.can as cdb
import numpy as np
import pytest
from cantools.database.conversion import BaseConversion
from hypothesis import assume, given, settings
from hypothesis import strategies as st

from crankbeat.errors import InputError
from crankbeat.logger.can.bits import decode_raw, decode_signal, encode_signal, signal_bits
from crankbeat.logger.rig.model import CanSignal


def _element_start(sig: CanSignal, i: int) -> int:
    """DBC start bit of array element i, as documented in CanSignal (test-side arithmetic)."""
    if sig.byte_order == "little":
        return sig.start_bit + i * sig.length
    # Motorola: element i's MSB lies i*length bits later in MSB-first reading order.
    q = (sig.start_bit // 8) * 8 + 7 - sig.start_bit % 8 + i * sig.length
    return (q // 8) * 8 + 7 - q % 8


def _cantools_message(sig: CanSignal, length: int) -> cdb.Message:
    sigs = [
        cdb.Signal(
            f"e{i}",
            _element_start(sig, i),
            sig.length,
            byte_order="little_endian" if sig.byte_order == "little" else "big_endian",
            is_signed=sig.signed,
            conversion=BaseConversion.factory(scale=sig.scale, offset=sig.offset),
        )
        for i in range(sig.count)
    ]
    return cdb.Message(0x123, "m", length, sigs, strict=True)


@st.composite
def layouts(draw, max_bytes: int = 8):
    order = draw(st.sampled_from(["little", "big"]))
    length = draw(st.integers(1, 64))
    count = draw(st.integers(1, 4))
    assume(length * count <= 8 * max_bytes)
    start = draw(st.integers(0, 8 * max_bytes - 1))
    signed = draw(st.booleans())
    sig = CanSignal("s", start_bit=start, length=length, byte_order=order, signed=signed,
                    count=count)
    bits = signal_bits(sig)
    assume(max(bits) < 8 * max_bytes and len(bits) == length * count)
    return sig


@settings(max_examples=300, deadline=None)
@given(sig=layouts(), seed=st.integers(0, 2**32 - 1))
def test_decode_raw_matches_cantools(sig, seed):
    rng = np.random.default_rng(seed)
    data = rng.integers(0, 256, size=(5, 8), dtype=np.uint8)
    ours = decode_raw(data, sig).reshape(5, sig.count)
    msg = _cantools_message(sig, 8)
    for r in range(5):
        ref = msg.decode(bytes(data[r]), scaling=False)
        for i in range(sig.count):
            assert int(ours[r, i]) == ref[f"e{i}"]


@settings(max_examples=300, deadline=None)
@given(sig=layouts(), seed=st.integers(0, 2**32 - 1))
def test_encode_matches_cantools(sig, seed):
    """Our encoder writes the same bits as cantools; background bits stay as they were."""
    rng = np.random.default_rng(seed)
    lo = -(1 << (sig.length - 1)) if sig.signed else 0
    hi = (1 << (sig.length - 1)) - 1 if sig.signed else (1 << sig.length) - 1
    # keep to values float64 holds exactly: the encoder takes physical (float) values
    lo, hi = max(lo, -(2**52)), min(hi, 2**52)
    raw = [[int(rng.integers(lo, hi, endpoint=True)) for _ in range(sig.count)] for _ in range(4)]
    background = rng.integers(0, 256, size=(4, 8), dtype=np.uint8)
    data = background.copy()
    encode_signal(np.array(raw, dtype=np.float64), sig, data)
    msg = _cantools_message(sig, 8)
    ours_bits = signal_bits(sig)
    for r in range(4):
        ref = msg.encode({f"e{i}": raw[r][i] for i in range(sig.count)}, scaling=False)
        ref_int = int.from_bytes(ref, "little")
        got_int = int.from_bytes(bytes(data[r]), "little")
        bg_int = int.from_bytes(bytes(background[r]), "little")
        for b in range(64):
            want = (ref_int >> b) & 1 if b in ours_bits else (bg_int >> b) & 1
            assert (got_int >> b) & 1 == want, f"bit {b}"


@settings(max_examples=100, deadline=None)
@given(sig=layouts(max_bytes=64), seed=st.integers(0, 2**32 - 1))
def test_fd_frames_match_cantools(sig, seed):
    rng = np.random.default_rng(seed)
    data = rng.integers(0, 256, size=(3, 64), dtype=np.uint8)
    ours = decode_raw(data, sig).reshape(3, sig.count)
    msg = _cantools_message(sig, 64)
    for r in range(3):
        ref = msg.decode(bytes(data[r]), scaling=False)
        for i in range(sig.count):
            assert int(ours[r, i]) == ref[f"e{i}"]


def test_physical_scaling_matches_cantools():
    sig = CanSignal("t", start_bit=4, length=12, byte_order="little", signed=True,
                    scale=0.0625, offset=-40.0)
    msg = _cantools_message(sig, 8)
    rng = np.random.default_rng(1)
    data = rng.integers(0, 256, size=(50, 8), dtype=np.uint8)
    ours = decode_signal(data, sig)
    ref = [msg.decode(bytes(row))["e0"] for row in data]
    np.testing.assert_allclose(ours, ref, rtol=0, atol=1e-12)


def test_motorola_worked_example():
    # common practice (DBC sawtooth): a 16-bit Motorola signal with start bit 7 reads bytes 0,1
    # as one big-endian word, so 0x12 0x34 is 0x1234; the Intel reading of start bit 0 is 0x3412.
    data = np.array([[0x12, 0x34, 0, 0, 0, 0, 0, 0]], dtype=np.uint8)
    be = CanSignal("w", start_bit=7, length=16, byte_order="big")
    le = CanSignal("w", start_bit=0, length=16, byte_order="little")
    assert int(decode_raw(data, be)[0]) == 0x1234
    assert int(decode_raw(data, le)[0]) == 0x3412


def test_reference_rig_tooth_frame():
    # docs/rig.md: bytes 2..7 carry three uint16 LE periods in 0.25 us; 0xFFFF = saturated.
    sig = CanSignal("p", start_bit=16, length=16, count=3, scale=0.25e-6,
                    saturated_raw=0xFFFF)
    data = np.array([[7, 1, 0x40, 0x1F, 0xFF, 0xFF, 0x10, 0x27]], dtype=np.uint8)
    got = decode_signal(data, sig)
    assert got.shape == (1, 3)
    assert got[0, 0] == pytest.approx(0x1F40 * 0.25e-6)  # 8000 counts = 2 ms
    assert np.isnan(got[0, 1])
    assert got[0, 2] == pytest.approx(10000 * 0.25e-6)


def test_encode_rounds_clips_and_writes_nan_as_saturated():
    sig = CanSignal("v", start_bit=8, length=8, scale=0.5, offset=-10.0, saturated_raw=0xFF)
    data = np.zeros((4, 8), dtype=np.uint8)
    encode_signal([0.26 - 10.0, 1e9, -1e9, np.nan], sig, data)
    # 0.26/0.5 = 0.52 rounds to 1; beyond range clips to 255 / 0; NaN -> saturated 0xFF
    assert list(data[:, 1]) == [1, 255, 0, 255]
    assert np.all(data[:, [0, 2, 3, 4, 5, 6, 7]] == 0)


def test_signed_saturated_pattern_and_nan_without_saturation():
    sig = CanSignal("s", start_bit=0, length=8, signed=True, saturated_raw=-1)
    data = np.array([[0xFF] + [0] * 7, [0x80] + [0] * 7], dtype=np.uint8)
    got = decode_signal(data, sig)
    assert np.isnan(got[0]) and got[1] == -128.0  # two's complement, common practice
    with pytest.raises(InputError, match="saturated_raw"):
        encode_signal(np.nan, CanSignal("q", start_bit=0, length=8), data)


def test_bad_inputs_name_the_problem():
    sig = CanSignal("wide", start_bit=56, length=16)
    with pytest.raises(InputError, match="needs 9 data bytes, frames have 8"):
        decode_raw(np.zeros((1, 8), np.uint8), sig)
    with pytest.raises(InputError, match="uint8"):
        decode_raw(np.zeros((1, 8), np.int16), CanSignal("a", start_bit=0, length=8))
    with pytest.raises(InputError, match="length must be 1..64 bits, got 0"):
        signal_bits(CanSignal("z", start_bit=0, length=0))


def test_signal_bits_motorola_crosses_bytes():
    # start bit 13 (byte 1 bit 5) MSB, 11 bits: byte 1 bits 5..0, then byte 2 bits 7..3
    sig = CanSignal("m", start_bit=13, length=11, byte_order="big")
    assert signal_bits(sig) == {8, 9, 10, 11, 12, 13, 19, 20, 21, 22, 23}
