"""CAN log sources against python-can's own writers and readers."""

from __future__ import annotations

import gzip
import os
from pathlib import Path

import can
import numpy as np
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st

from crankbeat.errors import FormatError, SourceError
from crankbeat.logger.can.sources import (
    CandumpFastSource,
    FrameBatch,
    LogFileSource,
    concat,
    open_log,
)

FIXTURES = Path(__file__).resolve().parent.parent / "fixtures"
T0 = 1_767_225_600.0


def _variety() -> list[can.Message]:
    """Every kind of frame a candump log holds: 11/29-bit ids, DLC 0..8, remote, error, FD."""
    msgs = []
    for i in range(40):
        msgs.append(can.Message(timestamp=T0 + 0.000731 * i, arbitration_id=(0x0A0 + i) & 0x7FF,
                                is_extended_id=False, data=bytes((i * 7 + k) & 0xFF
                                                                 for k in range(i % 9))))
        msgs.append(can.Message(timestamp=T0 + 0.000731 * i + 1e-6,
                                arbitration_id=0x18FF0000 + i, is_extended_id=True,
                                data=bytes(range(8 - i % 9))))
    msgs.append(can.Message(timestamp=T0 + 1.0, arbitration_id=0x123, is_extended_id=False,
                            is_remote_frame=True, dlc=3))
    msgs.append(can.Message(timestamp=T0 + 1.1, arbitration_id=0x1ABCDE0, is_extended_id=True,
                            is_remote_frame=True))
    msgs.append(can.Message(timestamp=T0 + 1.2, is_error_frame=True))
    msgs.append(can.Message(timestamp=T0 + 1.3, arbitration_id=0x7FF, is_extended_id=False,
                            is_fd=True, bitrate_switch=True, data=bytes(range(64))))
    msgs.append(can.Message(timestamp=T0 + 1.4, arbitration_id=0x10, is_extended_id=False,
                            is_fd=True, error_state_indicator=True, data=bytes(range(12))))
    return msgs


def _write(path: Path, msgs: list[can.Message]) -> Path:
    with can.Logger(str(path)) as w:  # python-can picks its writer by suffix
        for m in msgs:
            w.on_message_received(m)
    return path


def _read(source) -> FrameBatch:
    with source as s:
        return concat(list(s.batches()))


def assert_same_frames(a: FrameBatch, b: FrameBatch) -> None:
    assert len(a) == len(b)
    np.testing.assert_array_equal(a.ts, b.ts)  # exact: same doubles
    for col in ("can_id", "extended", "dlc", "is_error", "is_remote", "is_fd"):
        np.testing.assert_array_equal(getattr(a, col), getattr(b, col), err_msg=col)
    for i in range(len(a)):
        n = int(a.dlc[i])
        assert bytes(a.data[i, :n]) == bytes(b.data[i, :n]), f"frame {i}"


def test_fast_path_equals_python_can_reader(tmp_path):
    # reference: python-can's CanutilsLogWriter writes, its LogReader reads
    p = _write(tmp_path / "v.log", _variety())
    fast = _read(CandumpFastSource(p))
    ref = _read(LogFileSource(p))
    assert_same_frames(fast, ref)
    assert fast.is_error.sum() == 1 and fast.is_remote.sum() == 2 and fast.is_fd.sum() == 2
    assert int(fast.dlc[fast.is_fd][0]) == 64


def test_fast_path_small_blocks_give_the_same_frames(tmp_path):
    p = _write(tmp_path / "v.log", _variety())
    assert_same_frames(_read(CandumpFastSource(p, block_bytes=97)), _read(LogFileSource(p)))


def test_hand_written_lines_python_can_accepts(tmp_path):
    # lines candump/python-can accept beyond the writer's own form: lower-case hex, no
    # direction, remote with a DLC, CRLF, blank lines, two spaces, an integer timestamp
    text = (
        "(1767225600.000100) can0 0a0#deadbeef\r\n"
        "\n"
        "(1767225600.000200) can1 1FFFFFFF#R5 R\n"
        "(1767225600.3)  vcan0 100#0102 T\n"
        "(1767225601) can0 7ff#\n"
        "   (1767225601.000001) can0 00000123#11 r\n"
        "(1767225601.000002) can0 10##31122\n"
    )
    p = tmp_path / "h.log"
    p.write_bytes(text.encode())
    fast = _read(CandumpFastSource(p))
    assert_same_frames(fast, _read(LogFileSource(p)))
    assert len(fast) == 6
    assert list(fast.index) == [1, 3, 4, 5, 6, 7]  # line numbers
    assert fast.extended.tolist() == [False, True, False, False, True, False]


def _frame(t, i, ext, d, kind):
    if kind == "error":
        return can.Message(timestamp=t, is_error_frame=True)
    if kind == "remote":
        return can.Message(timestamp=t, arbitration_id=i & (0x1FFFFFFF if ext else 0x7FF),
                           is_extended_id=ext, is_remote_frame=True, dlc=min(len(d), 8))
    return can.Message(timestamp=t, arbitration_id=i & (0x1FFFFFFF if ext else 0x7FF),
                       is_extended_id=ext, is_fd=kind == "fd", bitrate_switch=kind == "fd",
                       data=d if kind == "fd" else d[:8])


frames = st.builds(
    _frame,
    st.floats(0, 2e9, allow_nan=False).map(lambda x: round(x, 6)),
    st.integers(0, 2**29 - 1), st.booleans(), st.binary(max_size=64),
    st.sampled_from(["data", "data", "data", "remote", "error", "fd"]),
)


@settings(max_examples=60, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(msgs=st.lists(frames, min_size=1, max_size=30))
def test_random_logs_fast_equals_python_can(tmp_path, msgs):
    msgs.sort(key=lambda m: m.timestamp)
    p = _write(tmp_path / "r.log", msgs)
    assert_same_frames(_read(CandumpFastSource(p, block_bytes=211)), _read(LogFileSource(p)))


@settings(max_examples=40, deadline=None,
          suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(msgs=st.lists(frames, min_size=1, max_size=20),
       junk=st.lists(st.tuples(st.integers(0, 40), st.binary(min_size=1, max_size=60)),
                     max_size=6))
def test_junk_lines_are_skipped_and_nothing_good_is_lost(tmp_path, msgs, junk):
    msgs.sort(key=lambda m: m.timestamp)
    clean = _write(tmp_path / "clean.log", msgs)
    lines = clean.read_bytes().splitlines(keepends=True)
    inserted = 0
    for pos, text in sorted(junk, reverse=True):
        text = b"#" + text.replace(b"\n", b"").replace(b"\r", b"")  # never a frame
        lines.insert(min(pos, len(lines)), text + b"\n")
        inserted += 1
    dirty = tmp_path / "dirty.log"
    dirty.write_bytes(b"".join(lines))
    src = CandumpFastSource(dirty, block_bytes=128)
    assert_same_frames(_read(src), _read(LogFileSource(clean)))
    assert src.bad_records == inserted


@pytest.mark.parametrize("log", sorted(FIXTURES.rglob("*.log")), ids=lambda p: p.name)
def test_fixture_logs_fast_equals_python_can(log):
    assert_same_frames(_read(CandumpFastSource(log)), _read(LogFileSource(log)))


@pytest.mark.parametrize("suffix", [".asc", ".blf", ".csv", ".log.gz", ".asc.gz"])
def test_python_can_formats_round_trip(tmp_path, suffix):
    msgs = _variety()[:-2]  # no CAN FD: .csv drops its flags
    src = open_log(_write(tmp_path / f"x{suffix}", msgs))
    got = _read(src)
    assert len(got) == len(msgs)
    want_ts = np.array([m.timestamp for m in msgs])
    if ".asc" in suffix:
        # python-can's .asc keeps the start as a date to the millisecond and offsets to the
        # microsecond: absolute times move by < 1 ms, spacing is exact to 1 us
        assert np.max(np.abs(got.ts - want_ts)) < 1e-3
        np.testing.assert_allclose(np.diff(got.ts), np.diff(want_ts), atol=1.5e-6)
    else:
        np.testing.assert_allclose(got.ts, want_ts, rtol=0, atol=1e-6)
    for i, m in enumerate(msgs):
        assert bool(got.is_error[i]) == m.is_error_frame
        if m.is_error_frame:
            continue
        assert int(got.can_id[i]) == m.arbitration_id and bool(got.extended[i]) == m.is_extended_id
        assert bool(got.is_remote[i]) == m.is_remote_frame
        if not m.is_remote_frame:
            assert bytes(got.data[i, : got.dlc[i]]) == bytes(m.data)


def test_trc_round_trip(tmp_path):
    # python-can's TRC writer takes neither remote nor error frames
    msgs = [m for m in _variety() if not (m.is_remote_frame or m.is_error_frame or m.is_fd)]
    got = _read(open_log(_write(tmp_path / "x.trc", msgs)))
    np.testing.assert_allclose(got.ts, [m.timestamp for m in msgs], rtol=0, atol=1e-6)
    assert [bytes(got.data[i, : got.dlc[i]]) for i in range(len(got))] == [
        bytes(m.data) for m in msgs]


def test_open_log_picks_backend_by_suffix(tmp_path):
    p = _write(tmp_path / "a.log", _variety()[:3])
    with open_log(p) as s:
        assert isinstance(s, CandumpFastSource)
    with open_log(p, fast=False) as s:
        assert isinstance(s, LogFileSource)
    gz = tmp_path / "a.log.gz"
    gz.write_bytes(gzip.compress(p.read_bytes()))
    with open_log(gz) as s:
        assert isinstance(s, CandumpFastSource)
        assert len(concat(list(s.batches()))) == 3


# ----------------------------------------------------------------------------- bad input
def test_random_bytes_as_log_is_one_clear_error(tmp_path):
    p = tmp_path / "junk.log"
    p.write_bytes(np.random.default_rng(3).integers(0, 256, 5000, dtype=np.uint8).tobytes())
    for fast in (True, False):
        with pytest.raises(FormatError) as e:
            _read(open_log(p, fast=fast))
        msg = str(e.value)
        assert "\n" not in msg and str(p) in msg
        assert ("line 1" if fast else "frame 0") in msg


def test_a_few_junk_lines_then_frames_are_skipped_but_only_junk_is_an_error(tmp_path):
    p = tmp_path / "j.log"
    good = _write(tmp_path / "g.log", _variety()[:5]).read_bytes()
    p.write_bytes(b"junk one\njunk two\n" + good)
    src = CandumpFastSource(p, block_bytes=16)
    assert len(_read(src)) == 5 and src.bad_records == 2
    p.write_bytes(b"junk one\njunk two\n")
    with pytest.raises(FormatError, match="line 1: not a candump log"):
        _read(CandumpFastSource(p))


def test_random_bytes_as_blf_is_one_clear_error(tmp_path):
    p = tmp_path / "junk.blf"
    p.write_bytes(np.random.default_rng(4).integers(0, 256, 5000, dtype=np.uint8).tobytes())
    with pytest.raises(FormatError) as e:
        _read(open_log(p))
    assert "\n" not in str(e.value) and str(p) in str(e.value) and "offset 0" in str(e.value)


def test_blf_cut_short_keeps_the_frames_before_with_a_note(tmp_path):
    msgs = _variety()[:-2] * 40  # several BLF containers
    p = _write(tmp_path / "c.blf", msgs)
    whole = p.read_bytes()
    p.write_bytes(whole[: len(whole) // 2])
    src = open_log(p)
    got = _read(src)
    assert 0 < len(got) < len(msgs)
    assert bytes(got.data[5, : got.dlc[5]]) == bytes(msgs[5].data)
    assert src.notes == [f"{p} offset {len(whole) // 2}: file ends before the {len(whole)} "
                         f"bytes its header gives (cut short?); the {len(got)} frames before "
                         "the cut were kept"]


def test_missing_file(tmp_path):
    with pytest.raises(SourceError, match="cannot open"):
        open_log(tmp_path / "nope.log")


def test_log_cut_mid_line_keeps_everything_before(tmp_path):
    msgs = _variety()[:30]
    p = _write(tmp_path / "c.log", msgs)
    text = p.read_bytes()
    cut = text[: text.rfind(b"#") + 2]  # last line ends after one hex digit
    p.write_bytes(cut)
    src = CandumpFastSource(p)
    got = _read(src)
    assert len(got) == 29
    assert src.bad_records == 1
    assert src.notes == [f"{p} line 30: expected '(seconds) interface id#hexdata', found "
                         f"{cut.splitlines()[-1].decode()!r}; line skipped"]


def test_garbage_lines_are_counted_and_skipped(tmp_path):
    msgs = _variety()[:20]
    p = _write(tmp_path / "g.log", msgs)
    lines = p.read_bytes().splitlines(keepends=True)
    lines.insert(5, b"\x00\xff garbage \x81\n")
    lines.insert(12, b"(12.5) can0 0A0#XYZ1\n")
    lines.insert(15, b"(12.5) can0 0A0#11223344556677889900\n")  # 10 bytes: not classic CAN
    p.write_bytes(b"".join(lines))
    src = CandumpFastSource(p)
    got = _read(src)
    assert len(got) == 20 and src.bad_records == 3
    assert [n.split(":")[0] for n in src.notes] == [f"{p} line 6", f"{p} line 13",
                                                     f"{p} line 16"]
    ref = _read(LogFileSource(_write(tmp_path / "ok.log", msgs)))
    np.testing.assert_array_equal(got.ts, ref.ts)


def test_python_can_path_goes_on_after_damage_with_a_note(tmp_path):
    p = _write(tmp_path / "d.log", _variety()[:20])
    lines = p.read_bytes().splitlines(keepends=True)
    lines.insert(10, b"not a frame\n")
    p.write_bytes(b"".join(lines))
    src = LogFileSource(p)
    got = _read(src)
    assert len(got) == 20  # python-can's reader is restarted after the damaged line
    assert src.bad_records == 1 and "line 11: unreadable" in src.notes[0]


def test_overlong_line_is_one_bad_line(tmp_path):
    p = _write(tmp_path / "o.log", _variety()[:4])
    body = p.read_bytes().splitlines(keepends=True)
    p.write_bytes(body[0] + b"x" * 20000 + b"\n" + b"".join(body[1:]))
    src = CandumpFastSource(p, block_bytes=4096)
    got = _read(src)
    assert len(got) == 4 and src.bad_records == 1 and "line 2: line longer" in src.notes[0]


def test_progress_reaches_the_file_size(tmp_path):
    p = _write(tmp_path / "v.log", _variety())
    for src in (CandumpFastSource(p, block_bytes=512), LogFileSource(p)):
        with src:
            for _ in src.batches(max_frames=10):
                pass
            done, total = src.progress()
            assert total == os.path.getsize(p) and done == total
