"""Capture file round trips and damage handling, with the byte layout checked by struct."""

from __future__ import annotations

import io
import struct

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from crankbeat.errors import FormatError, SourceError
from crankbeat.logger.serial.capture import MAGIC, CaptureReader, CaptureWriter

RECORDS = [(1000.25, b"\xa5\x5a\x01"), (1000.5, b""), (1001.0, bytes(range(256)) * 3)]


def _write(path, records):
    with CaptureWriter(path) as w:
        for t, data in records:
            w.write(t, data)


def test_layout_is_magic_then_float64_uint32_bytes(tmp_path):
    # docs/rig.md: magic "ACCRAW1\n", then per record float64 LE time, uint32 LE n, n bytes.
    path = tmp_path / "a.accraw"
    _write(path, RECORDS)
    want = MAGIC + b"".join(struct.pack("<dI", t, len(d)) + d for t, d in RECORDS)
    assert path.read_bytes() == want


def test_writer_takes_open_file_and_leaves_it_open():
    buf = io.BytesIO()
    with CaptureWriter(buf) as w:
        w.write(1.5, b"xy")
        w.flush()
    assert not buf.closed
    assert buf.getvalue() == MAGIC + struct.pack("<dI", 1.5, 2) + b"xy"


@settings(max_examples=30, deadline=None)
@given(st.floats(1e8, 4e9), st.lists(st.tuples(st.floats(0, 2),
                                               st.binary(max_size=300)), max_size=20))
def test_round_trip(tmp_path_factory, t0, steps):
    # host times are epoch seconds (time.time()); reads follow each other within seconds (a
    # longer pause is taken when the read after it confirms it: test_serial_faults)
    records, t = [], t0
    for dt, data in steps:
        t += dt
        records.append((t, data))
    path = tmp_path_factory.mktemp("cap") / "r.accraw"
    _write(path, records)
    with CaptureReader(path) as r:
        got = list(r)
    assert got == records


def test_batches(tmp_path):
    path = tmp_path / "b.accraw"
    recs = [(float(i), bytes([i]) * i) for i in range(10)]
    _write(path, recs)
    with CaptureReader(path) as r:
        assert r.read(4) == recs[:4]
        assert r.read(4) == recs[4:8]
        assert r.read() == recs[8:]
        assert r.read() == []
        assert r.notes == []


def test_read_until_keeps_step_with_a_clock(tmp_path):
    path = tmp_path / "u.accraw"
    recs = [(float(t), bytes([t])) for t in (1, 2, 3, 5, 8, 13)]
    _write(path, recs)
    with CaptureReader(path) as r:
        assert r.read_until(0.5) == []
        assert r.read_until(3.0) == recs[:3]
        assert r.read_until(4.0) == []
        assert r.read(1) == [recs[3]]
        assert r.read_until(100.0) == recs[4:]
        assert r.read_until(200.0) == [] and r.read() == []


@pytest.mark.parametrize("cut", range(1, 16))
def test_cut_mid_record_keeps_whole_records(tmp_path, cut):
    path = tmp_path / "c.accraw"
    recs = [(1.0, b"abcd"), (2.0, b"efgh"), (3.0, b"ijkl")]
    _write(path, recs)
    whole = path.read_bytes()
    path.write_bytes(whole[: len(whole) - cut])  # cut inside the last record (16 bytes long)
    with CaptureReader(path) as r:
        got = list(r)
    assert got == recs[:2]
    last_start = len(MAGIC) + 2 * 16
    assert len(r.notes) == 1 and f"offset {last_start}" in r.notes[0]


def test_bad_magic_names_file_and_offset(tmp_path):
    path = tmp_path / "x.accraw"
    path.write_bytes(b"NOTACAPTUREFILE")
    with pytest.raises(FormatError) as err:
        CaptureReader(path)
    assert str(err.value) == f"{path}: offset 0: expected magic b'ACCRAW1\\n', found b'NOTACAPT'"


def test_missing_file_is_source_error(tmp_path):
    with pytest.raises(SourceError, match="cannot open"):
        CaptureReader(tmp_path / "none.accraw")


def test_implausible_length_resynchronises_on_the_next_record(tmp_path):
    path = tmp_path / "l.accraw"
    good = struct.pack("<dI", 1.7e9, 3) + b"abc"
    huge = struct.pack("<dI", 1.7e9 + 1, 17 * 1024 * 1024) + b"x" * 100
    path.write_bytes(MAGIC + good + huge + good)
    with CaptureReader(path) as r:
        # the damaged record's bytes are kept with its (plausible) time; the next one follows
        assert list(r) == [(1.7e9, b"abc"), (1.7e9 + 1, b"x" * 100), (1.7e9, b"abc")]
    assert "offset 23" in r.notes[0] and "claims" in r.notes[0] and "offset 135" in r.notes[0]
    assert r.bad_records == 1 and r.bytes_lost == 12
    beyond = struct.pack("<dI", 1.7e9 + 1, 1000) + b"x" * 10
    path.write_bytes(MAGIC + good + beyond)
    with CaptureReader(path) as r:
        assert list(r) == [(1.7e9, b"abc")]
    assert "offset 23" in r.notes[0] and "10 of 1000" in r.notes[0]


def test_bad_time_keeps_the_bytes_with_the_next_time(tmp_path):
    path = tmp_path / "t.accraw"
    _write(path, [(1.7e9, b"a"), (float("inf"), b"b"), (1.7e9 + 1, b"c"), (-1.7e9, b"d")])
    with CaptureReader(path) as r:
        assert list(r) == [(1.7e9, b"a"), (1.7e9 + 1, b"b"), (1.7e9 + 1, b"c"),
                           (1.7e9 + 1, b"d")]
    assert r.bad_records == 2 and "not plausible" in r.notes[0]


def test_one_bad_length_in_a_ride_keeps_the_records_after_it(tmp_path):
    recs = [(1.7e9 + 0.008 * k, bytes([k % 256]) * 17) for k in range(2000)]
    for bad in (0xFFFFFF, 17 + 7, 17 - 5, 0):
        b = bytearray(MAGIC)
        for k, (t, d) in enumerate(recs):
            b += struct.pack("<dI", t, bad if k == 1000 else len(d)) + d
        path = tmp_path / "b.accraw"
        path.write_bytes(bytes(b))
        with CaptureReader(path) as r:
            got = list(r)
        kept = {t for t, _ in got}
        # every record but the damaged one and at most the one its length ran into
        assert len({t for t, _ in recs} - kept) <= 2, (bad, len(kept))
        assert r.bad_records >= 1 and r.notes


def test_time_backwards_is_noted_with_index(tmp_path):
    path = tmp_path / "t.accraw"
    _write(path, [(5.0, b"a"), (4.0, b"b"), (6.0, b"c")])
    with CaptureReader(path) as r:
        assert [t for t, _ in r] == [5.0, 4.0, 6.0]
    assert r.backwards == 1 and "record 1" in r.notes[0] and "backwards" in r.notes[0]
