"""The frame parser against a slow, obvious byte-by-byte reference scanner.

The reference below walks the stream one byte at a time and checks each frame with Python's own
``binascii.crc_hqx`` (or plain ``sum``/xor for the 8-bit kinds), so it shares no code with the
vectorised parser. Hypothesis drives arbitrary streams and arbitrary cuts into port reads.
"""

from __future__ import annotations

import binascii
import struct

import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from test_serial_sensors import ODD, XOR, Larch

from crankbeat.logger.serial.frames import encode_frames
from crankbeat.logger.serial.parser import SerialFrameParser, parse_stream


def _ref_check(sensor, frame: bytes) -> bool:
    c = sensor.checksum
    covered = frame[c.start : c.end]
    stored = int.from_bytes(frame[c.at : c.at + c.size], c.byte_order)
    if c.kind == "crc16-ccitt-false":
        return binascii.crc_hqx(covered, 0xFFFF) == stored
    if c.kind == "sum8":
        return sum(covered) % 256 == stored
    x = 0
    for b in covered:
        x ^= b
    return x == stored


def reference_scan(sensor, stream: bytes) -> list[int]:
    """Start offsets of accepted frames: greedy, one byte at a time (the slow obvious way)."""
    L, sync, out, i = sensor.frame_length, sensor.sync, [], 0
    while i + L <= len(stream):
        if stream[i : i + len(sync)] == sync and _ref_check(sensor, stream[i : i + L]):
            out.append(i)
            i += L
        else:
            i += 1
    return out


def _frames(sensor, n, seed=0, seq0=0, t0=0):
    rng = np.random.default_rng(seed)
    seq = seq0 + np.arange(n)
    t = t0 + np.round(np.arange(n) / sensor.sample_rate_hz / sensor.device_time_unit_s)
    acc = rng.integers(-30000, 30000, size=(n, 3))
    return encode_frames(sensor, seq, t.astype(np.int64), acc), acc


def _chunks(stream: bytes, cuts: list[int]) -> list[tuple[float, bytes]]:
    edges = sorted({0, len(stream), *[c % (len(stream) + 1) for c in cuts]})
    return [(float(k), stream[a:b]) for k, (a, b) in enumerate(zip(edges[:-1], edges[1:]))
            if b > a]


def _accel_rows(sensor, stream, offsets):
    L = sensor.frame_length
    fx = [sensor.field_for(r) for r in ("accel_x", "accel_y", "accel_z")]
    rows = []
    for o in offsets:
        fr = stream[o : o + L]
        rows.append([int.from_bytes(fr[f.offset : f.offset + f.size], f.byte_order, signed=True)
                     * f.scale for f in fx])
    return np.array(rows).reshape(-1, 3)


# --- hypothesis: embedded frames in noise, arbitrary chunking ----------------------------------
segment = st.one_of(
    st.binary(min_size=0, max_size=40),  # noise, possibly containing sync bytes
    st.builds(lambda seed: ("frame", seed), st.integers(0, 2**31)),
    st.sampled_from([b"\xa5", b"\xa5\x5a", b"\xa5\x5a\x00\x00"]),  # tempting partial syncs
)


@settings(max_examples=150, deadline=None, suppress_health_check=[HealthCheck.too_slow])
@given(st.lists(segment, max_size=25), st.lists(st.integers(0, 10_000), max_size=12))
def test_embedded_frames_recovered_once_any_chunking(segments, cuts):
    stream, embedded = b"", []
    for k, seg in enumerate(segments):
        if isinstance(seg, tuple):
            data, _ = _frames(Larch, 1, seed=seg[1], seq0=k)
            embedded.append(len(stream))
            stream += data
        else:
            stream += seg
    parser = SerialFrameParser(Larch)
    got = parser.push_records(_chunks(stream, cuts))
    ref = reference_scan(Larch, stream)
    # Every embedded frame once; anything else accepted must pass the reference check too.
    assert set(embedded) <= set(ref)
    assert len(got) == len(ref) == parser.counts.good
    np.testing.assert_array_equal(got.accel, _accel_rows(Larch, stream, ref))
    c = parser.counts
    assert c.skipped + c.good * 16 + len(parser._carry) == len(stream)


@settings(max_examples=60, deadline=None)
@given(st.sampled_from([Larch, ODD, XOR]), st.binary(max_size=600),
       st.lists(st.integers(0, 10_000), max_size=8))
def test_noise_matches_reference_for_every_board(sensor, noise, cuts):
    # Pure noise: with a CRC-16 a chance frame is a 1-in-2^32 event per byte for Larch; the 8-bit
    # checksums of the other boards can pass by chance, so the reference decides.
    got, counts = parse_stream(sensor, _chunks(noise, cuts))
    ref = reference_scan(sensor, noise)
    assert len(got) == len(ref)
    np.testing.assert_array_equal(got.accel, _accel_rows(sensor, noise, ref))
    if sensor is Larch:
        assert len(got) == 0


@settings(max_examples=40, deadline=None)
@given(st.sampled_from([Larch, ODD, XOR]), st.integers(1, 60), st.data())
def test_damage_matches_reference(sensor, n, data):
    stream = bytearray(_frames(sensor, n, seed=n)[0])
    for _ in range(data.draw(st.integers(0, 4))):
        kind = data.draw(st.sampled_from(["drop", "flip", "insert"]))
        at = data.draw(st.integers(0, max(len(stream) - 1, 0)))
        if kind == "drop" and stream:
            del stream[at]
        elif kind == "flip" and stream:
            stream[at] ^= 1 << data.draw(st.integers(0, 7))
        else:
            stream[at:at] = data.draw(st.binary(min_size=1, max_size=5))
    stream = bytes(stream)
    cuts = data.draw(st.lists(st.integers(0, 10_000), max_size=8))
    got, _ = parse_stream(sensor, _chunks(stream, cuts))
    ref = reference_scan(sensor, stream)
    np.testing.assert_array_equal(got.accel, _accel_rows(sensor, stream, ref))


# --- specific damage ----------------------------------------------------------------------------
def test_start_mid_frame():
    stream, acc = _frames(Larch, 50)
    for k in range(1, 16):
        got, counts = parse_stream(Larch, [(0.0, stream[k:])])
        np.testing.assert_array_equal(got.accel, acc[1:] / 2048.0)
        assert counts.skipped == 16 - k and counts.lost == 0 and counts.corrupt == 0


def test_single_dropped_byte_loses_one_frame_and_counts_it():
    stream, acc = _frames(Larch, 100)
    for frame in (0, 7, 50, 98):
        for within in (0, 1, 5, 15):
            cut = frame * 16 + within
            damaged = stream[:cut] + stream[cut + 1 :]
            got, counts = parse_stream(Larch, [(0.0, damaged)])
            keep = [i for i in range(100) if i != frame]
            np.testing.assert_array_equal(got.accel, acc[keep] / 2048.0)
            assert counts.lost == (1 if frame > 0 else 0)  # a loss before the first is unseen
            if frame > 0:
                assert got.lost_before[frame] == 1 and got.lost_before.sum() == 1
            assert counts.skipped == 15


def test_every_single_bit_flip_is_rejected():
    # A CRC-16 detects every single-bit error (property of any CRC whose polynomial has more
    # than one term; common practice). A flip in the sync makes the frame unfindable instead.
    stream, acc = _frames(Larch, 3)
    for bit in range(16 * 8):
        b = bytearray(stream)
        b[16 + bit // 8] ^= 1 << (bit % 8)
        got, counts = parse_stream(Larch, [(0.0, bytes(b))])
        np.testing.assert_array_equal(got.accel, acc[[0, 2]] / 2048.0)
        assert counts.lost == 1
        assert counts.corrupt == (0 if bit < 16 else 1)


def test_frame_inside_failed_frame_is_found():
    # A real frame that starts inside a candidate whose checksum failed (a truncated frame).
    stream, acc = _frames(Larch, 3)
    bad = stream[:9]  # sync + 7 bytes of frame 0, then frame 1 follows at once
    got, counts = parse_stream(Larch, [(0.0, bad + stream[16:])])
    np.testing.assert_array_equal(got.accel, acc[1:] / 2048.0)
    assert counts.corrupt == 1 and counts.skipped == 9
    p = SerialFrameParser(Larch)
    p.push(bad + stream[16:], 0.0)
    assert (p.good, p.corrupt, p.lost, p.skipped) == (2, 1, 0, 9)  # loss before the first: unseen


def test_frame_split_across_reads_gets_time_of_completing_read():
    stream, _ = _frames(Larch, 4)
    recs = [(10.0, stream[:20]), (11.0, stream[20:33]), (12.0, stream[33:])]
    got, _ = parse_stream(Larch, recs)
    assert got.host_time.tolist() == [10.0, 11.0, 12.0, 12.0]
    assert got.last_in_read.tolist() == [True, True, False, True]


def test_sequence_and_device_time_unwrap():
    # Sequence wraps at 65536, device time (µs, u32) wraps at 2^32 (docs/rig.md).
    n = 400
    seq0, t0 = 65536 - 100, 2**32 - 30_000
    stream, _ = _frames(Larch, n, seq0=seq0, t0=t0)
    reads = [(float(i), stream[i * 160 : (i + 1) * 160]) for i in range(40)]
    got, counts = parse_stream(Larch, reads)
    np.testing.assert_array_equal(got.seq, np.arange(n) + seq0 % 65536)
    np.testing.assert_allclose(np.diff(got.device_t), 0.5e-3, atol=1e-9)
    assert counts.lost == 0


def test_long_gap_beyond_sequence_range_is_counted_from_the_clock():
    # 70 000 frames missing at 2 kHz = 35 s: the u16 sequence alone would say 70000 - 65536.
    a, _ = _frames(Larch, 10)
    b, _ = _frames(Larch, 10, seq0=10 + 70_000, t0=(10 + 70_000) * 500)
    got, counts = parse_stream(Larch, [(0.0, a), (35.005, b)])
    assert counts.lost == 70_000 and got.lost_before[10] == 70_000
    assert got.seq[-1] == 10 + 70_000 + 9


def test_board_without_sequence_field_counts_losses_from_its_clock():
    stream, _ = _frames(ODD, 30)
    L = ODD.frame_length
    damaged = stream[: 5 * L] + stream[8 * L :]  # frames 5, 6, 7 gone
    got, counts = parse_stream(ODD, [(0.0, damaged)])
    assert len(got) == 27 and counts.lost == 3 and got.lost_before[5] == 3


def test_device_reset_is_a_break_and_rebased_on_host_time():
    a, _ = _frames(Larch, 20, seq0=5000, t0=900_000_000)
    b, _ = _frames(Larch, 20)  # the board restarted: sequence and clock from 0
    got, counts = parse_stream(Larch, [(100.0, a), (103.0, b)])
    assert got.break_before.tolist() == [False] * 20 + [True] + [False] * 19
    assert counts.clock_jumps == 1
    gap = got.device_t[20] - got.device_t[19]
    assert abs(gap - 3.0) < 0.01  # host says 3 s passed
    assert np.all(np.diff(got.device_t) > 0)


def test_link_break_record_drops_carry_and_marks_next_frame():
    stream, acc = _frames(Larch, 6)
    recs = [(1.0, stream[:40]), (1.1, b""), (2.0, stream[48:])]
    p = SerialFrameParser(Larch)
    got = p.push_records(recs)
    np.testing.assert_array_equal(got.accel, acc[[0, 1, 3, 4, 5]] / 2048.0)
    assert got.break_before.tolist() == [False, False, True, False, False]
    assert p.counts.breaks == 1 and p.counts.lost == 1 and p.counts.skipped == 8


def test_push_one_by_one_equals_whole_stream():
    stream, _ = _frames(Larch, 300, seed=3)
    noisy = stream[:1000] + b"\xa5\x5a junk" + stream[1000:]
    recs = _chunks(noisy, list(range(0, len(noisy), 37)))
    whole, wc = parse_stream(Larch, recs)
    p = SerialFrameParser(Larch)
    parts = [p.push(d, t) for t, d in recs]
    for name in ("seq", "device_t", "accel", "host_time", "lost_before", "last_in_read"):
        np.testing.assert_array_equal(np.concatenate([getattr(x, name) for x in parts]),
                                      getattr(whole, name))
    assert (p.counts.good, p.counts.corrupt, p.counts.skipped) == (wc.good, wc.corrupt, wc.skipped)


def test_struct_decoded_values():
    # Decode one frame independently with struct and compare every field.
    body = struct.pack("<HIhhh", 4321, 123456789, -2048, 1024, 2047)
    frame = b"\xa5\x5a" + body + struct.pack("<H", binascii.crc_hqx(body, 0xFFFF))
    got, _ = parse_stream(Larch, [(5.0, frame)])
    assert got.seq.tolist() == [4321]
    assert got.device_t.tolist() == pytest.approx([123.456789])
    np.testing.assert_array_equal(got.accel, [[-1.0, 0.5, 2047 / 2048]])


def test_passing_candidate_overlapping_an_accepted_frame_is_refused():
    # Built by hand on the sum8 board: frame A carries B's sync inside its payload (bytes 5..7),
    # and five bytes after A complete a B whose sum8 passes. Greedy from the left keeps A.
    a = encode_frames(ODD, None, np.array([0x7E81]), np.array([[0x5501, 2, 3]]))
    assert a[5:8] == ODD.sync
    tail = bytearray(4)
    b_covered = a[8:14] + bytes(tail)  # B's bytes 3..12
    tail.append(sum(b_covered) % 256)  # B's checksum at B[13]
    b = a[5:] + bytes(tail)
    assert sum(b[3:13]) % 256 == b[13]  # B really passes on its own
    c = encode_frames(ODD, None, np.array([9]), np.array([[7, 8, 9]]))
    stream = a + bytes(tail) + c
    got, counts = parse_stream(ODD, [(0.0, stream)])
    assert reference_scan(ODD, stream) == [0, 19]
    np.testing.assert_allclose(got.accel, [[0x5501 * 1e-3, 2e-3, 3e-3], [7e-3, 8e-3, 9e-3]])
    assert counts.skipped == 5
    alone, _ = parse_stream(ODD, [(0.0, b)])
    assert len(alone) == 1
